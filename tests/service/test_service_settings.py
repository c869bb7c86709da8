"""Service settings: the KNOWNGOOD_ environment, the tokens file, and validators that refuse bad values."""

from __future__ import annotations

import pytest
from knowngood.service.settings import Settings, get_settings
from pydantic import ValidationError

GOOD = "station-token-0001"


@pytest.fixture(autouse=True)
def _clean_env(monkeypatch):
    for name in ("KNOWNGOOD_STATION_TOKENS", "KNOWNGOOD_ADMIN_TOKENS", "KNOWNGOOD_TOKENS_FILE", "KNOWNGOOD_MODEL_PATH"):
        monkeypatch.delenv(name, raising=False)


def test_environment_with_prefix(monkeypatch, tmp_path, tiny_bundle):
    monkeypatch.setenv("KNOWNGOOD_STATION_TOKENS", f"{GOOD}, station-token-0002")
    monkeypatch.setenv("KNOWNGOOD_ADMIN_TOKENS", "admin-token-000001")
    monkeypatch.setenv("KNOWNGOOD_MODEL_PATH", str(tiny_bundle))
    monkeypatch.setenv("KNOWNGOOD_MAX_BATCH", "4")
    monkeypatch.setenv("KNOWNGOOD_KEEP_IMAGES", "true")
    s = Settings()
    assert s.station_tokens == [GOOD, "station-token-0002"] and s.admin_tokens == ["admin-token-000001"]
    assert s.model_path == tiny_bundle and s.max_batch == 4 and s.keep_images == "all"  # true: the earlier meaning
    assert s.torch_threads == 2 and s.onnx is True  # defaults
    roles = {t: c.role for t, c in s.tokens().items()}
    assert roles == {GOOD: "station", "station-token-0002": "station", "admin-token-000001": "admin"}


@pytest.mark.parametrize(
    "value, kept", [("true", "all"), ("false", "none"), ("flagged", "flagged"), ("all", "all"), ("none", "none")]
)
def test_keep_images_takes_the_policy_or_the_old_true_false(monkeypatch, value, kept):
    monkeypatch.setenv("KNOWNGOOD_KEEP_IMAGES", value)
    assert Settings(station_tokens=[GOOD]).keep_images == kept
    assert Settings(station_tokens=[GOOD]).keep_passed_share == 0.0


def test_default_keeps_flagged_images_and_a_bad_part_type_is_refused():
    assert Settings(station_tokens=[GOOD]).keep_images == "flagged"
    with pytest.raises(ValidationError, match="part_type"):
        Settings(station_tokens=[GOOD], part_type="../etc")
    with pytest.raises(ValidationError, match="keep_passed_share"):
        Settings(station_tokens=[GOOD], keep_passed_share=1.5)


def test_tokens_file(tmp_path):
    path = tmp_path / "tokens"
    path.write_text("# role token name\nstation line3-camera-token camera-3\n\nadmin qa-lead-token-000 Dana  # QA\n")
    tokens = Settings(tokens_file=path).tokens()
    assert tokens["line3-camera-token"].name == "camera-3" and tokens["line3-camera-token"].role == "station"
    assert tokens["qa-lead-token-000"].role == "admin" and tokens["qa-lead-token-000"].name == "Dana"


@pytest.mark.parametrize(
    "text, words",
    [
        ("operator some-long-token-1\n", ":1: expected"),
        ("station short\n", ":1: a token must be at least"),
        ("station a-long-token-here\nadmin a-long-token-here\n", "both as station and as admin"),
    ],
)
def test_bad_tokens_file(tmp_path, text, words):
    path = tmp_path / "tokens"
    path.write_text(text)
    with pytest.raises(ValidationError, match=words):
        Settings(tokens_file=path)


@pytest.mark.parametrize(
    "kwargs, words",
    [
        ({}, "no tokens configured"),
        ({"station_tokens": ["short"]}, "at least 12 characters"),
        ({"station_tokens": ["has a space in it"]}, "no spaces"),
        ({"station_tokens": [GOOD], "model_path": "/no/such/model.kgm"}, "no such file"),
        ({"station_tokens": [GOOD], "tokens_file": "/no/such/tokens"}, "no such file"),
        ({"station_tokens": [GOOD], "torch_threads": 0}, "torch_threads"),
        ({"station_tokens": [GOOD], "max_upload_bytes": 10}, "max_upload_bytes"),
        ({"station_tokens": [GOOD], "unknown_setting": 1}, "unknown_setting"),
    ],
)
def test_bad_values_are_refused(kwargs, words):
    with pytest.raises(ValidationError, match=words):
        Settings(**kwargs)


def test_empty_token_in_the_environment_is_ignored_not_accepted(monkeypatch):
    monkeypatch.setenv("KNOWNGOOD_STATION_TOKENS", " , ")
    with pytest.raises(ValidationError, match="no tokens configured"):
        Settings()


def test_get_settings_is_cached(monkeypatch):
    monkeypatch.setenv("KNOWNGOOD_STATION_TOKENS", GOOD)
    get_settings.cache_clear()
    try:
        assert get_settings() is get_settings()
    finally:
        get_settings.cache_clear()
