"""`knowngood serve`: registered through the entry point, refuses bad settings with exit code 2."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

from knowngood.service import cli as service_cli
from knowngood.training.cli import build_parser
from service_testkit import free_port


def test_serve_is_registered_through_the_entry_point(tiny_bundle, monkeypatch):
    args = build_parser().parse_args(["serve", str(tiny_bundle), "--port", "9123", "--db", "x.db", "--host", "::1"])
    assert args.func is service_cli.serve
    assert (args.model, args.port, args.db, args.host) == (tiny_bundle, 9123, "x.db", "::1")
    monkeypatch.setenv("KNOWNGOOD_STATION_TOKENS", "station-token-0001")
    settings = service_cli._settings(args)
    assert (settings.db, settings.database_url, settings.store_url()) == (Path("x.db"), None, "x.db")
    url = "postgresql://inspect@db.example/quality"  # a URL goes to database_url; the part type has a default
    args = build_parser().parse_args(["serve", "--db", url, "--part-type", "bracket-A"])
    settings = service_cli._settings(args)
    assert (settings.model_path, settings.database_url, settings.part_type) == (None, url, "bracket-A")


def test_missing_model_is_exit_2(capsys, monkeypatch):
    monkeypatch.setenv("KNOWNGOOD_STATION_TOKENS", "station-token-0001")
    assert service_cli.main(["serve", "/no/such/model.kgm"]) == 2
    assert "no such file: /no/such/model.kgm" in capsys.readouterr().err


def test_no_tokens_is_exit_2(capsys, monkeypatch, tiny_bundle):
    for name in ("KNOWNGOOD_STATION_TOKENS", "KNOWNGOOD_ADMIN_TOKENS", "KNOWNGOOD_TOKENS_FILE"):
        monkeypatch.delenv(name, raising=False)
    assert service_cli.main(["serve", str(tiny_bundle)]) == 2
    assert "no tokens configured" in capsys.readouterr().err


def test_bad_bundle_stops_the_server_at_start(tmp_path):
    bad = tmp_path / "bad.kgm"
    bad.write_bytes(b"PK\x03\x04 not really a bundle")
    exe = Path(sys.executable).with_name("knowngood")
    env = {"KNOWNGOOD_STATION_TOKENS": "station-token-0001", "PATH": "/usr/bin:/bin"}
    run = subprocess.run(
        [str(exe), "serve", str(bad), "--port", str(free_port()), "--db", str(tmp_path / "a.db")],
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
        cwd=tmp_path,
    )
    assert run.returncode == 2
    assert "not a readable bundle" in run.stderr
