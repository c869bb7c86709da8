"""Service settings: one pydantic-settings class (environment prefix KNOWNGOOD_), served by the cached
`get_settings()` dependency that tests override. Nothing else in the service reads the environment."""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Annotated, Literal

from knowngood.service.store_tables import DEFAULT_PART_TYPE
from knowngood.training.data import MAX_PIXELS, MIN_SIDE
from pydantic import Field, field_validator, model_validator
from pydantic_settings import BaseSettings, NoDecode, SettingsConfigDict

Role = Literal["station", "admin"]
MIN_TOKEN_LENGTH = 12
TokenList = Annotated[list[str], NoDecode]  # comma-separated in the environment, not JSON
PART_TYPE = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$"  # a part type's name: it appears in URLs and metric labels


@dataclass(frozen=True)
class Caller:
    """Who sent a request: the token's role and a label that names it without revealing it."""

    role: Role
    name: str

    @property
    def is_admin(self) -> bool:
        return self.role == "admin"


class Settings(BaseSettings):
    """Every service setting with its default; `KNOWNGOOD_<NAME>` in the environment sets `<name>`."""

    model_config = SettingsConfigDict(env_prefix="KNOWNGOOD_", extra="forbid", protected_namespaces=())

    model_path: Path | None = None  # bundle loaded at start; None = not ready until PUT /v1/model
    part_type: str = Field(DEFAULT_PART_TYPE, pattern=PART_TYPE)  # the part type the command-line bundle serves
    db: Path = Path("knowngood.db")  # SQLite audit store (WAL), unless database_url is set
    database_url: str | None = None  # postgresql://user@host/db (shared by instances) or an SQLite path
    data_dir: Path = Path("knowngood-data")  # read only: what earlier versions kept there
    sync_seconds: float = Field(2.0, gt=0, le=60)  # how often an instance follows the models others changed
    host: str = "127.0.0.1"
    port: int = Field(8000, ge=1, le=65535)
    station_tokens: TokenList = []  # may inspect, review and read
    admin_tokens: TokenList = []  # may also change the model and the threshold
    tokens_file: Path | None = None  # lines of "<role> <token> [name]"; '#' starts a comment
    max_upload_bytes: int = Field(32 * 1024 * 1024, ge=1024)  # request body limit (413) for inspections
    max_bundle_bytes: int = Field(256 * 1024 * 1024, ge=1024)  # request body limit (413) for PUT /v1/model
    max_pixels: int = Field(MAX_PIXELS, ge=1024)  # decompression-bomb guard, checked from the header (413)
    min_side: int = Field(MIN_SIDE, ge=1)  # also at least a quarter of the model's working size (422)
    max_batch: int = Field(16, ge=1, le=256)  # images per POST /v1/inspections/batch
    max_decodes: int = Field(2, ge=1, le=64)  # images decoded at once (each up to 8 bytes x max_pixels)
    max_queue: int = Field(8, ge=0, le=1024)  # requests waiting for a decode or the scoring pass; more: 503
    keep_bundles: int = Field(5, ge=1)  # uploaded bundles kept besides the current and previous model
    torch_threads: int = Field(2, ge=1, le=64)
    onnx: bool = True  # score with ONNX Runtime (same graph, a few times faster on CPU)
    keep_images: Literal["none", "flagged", "all"] = "flagged"  # uploaded files kept (heatmaps always are)
    keep_passed_share: float = Field(0.0, ge=0, le=1)  # with "flagged": this share of passed parts' images too
    retention_count: int = Field(10_000, ge=1)  # inspections whose files are kept; older files are deleted
    retention_days: float = Field(90.0, gt=0)  # files older than this are deleted; audit rows are kept
    drift_window: int = Field(200, ge=2)  # recent production images compared with the training reference
    drift_min_images: int = Field(20, ge=2)  # fewer than this: drift says "not enough images"
    drift_sigmas: float = Field(3.0, gt=0)  # drifting as rarely as a normal beyond this many std (drift.tail_limit)
    log_level: Literal["critical", "error", "warning", "info", "debug"] = "info"

    @field_validator("keep_images", mode="before")
    @classmethod
    def _keep_images(cls, value):
        """true / false (the earlier setting) mean all / none."""
        if isinstance(value, bool):
            return "all" if value else "none"
        if isinstance(value, str) and value.strip().lower() in ("true", "false", "1", "0", "yes", "no"):
            return "all" if value.strip().lower() in ("true", "1", "yes") else "none"
        return value

    @field_validator("database_url")
    @classmethod
    def _database_url(cls, value: str | None) -> str | None:
        if value is not None and not value.strip():
            return None
        return value

    def store_url(self) -> str:
        """What the audit store opens: KNOWNGOOD_DATABASE_URL, else the SQLite file `db`."""
        return self.database_url or str(self.db)

    @field_validator("station_tokens", "admin_tokens", mode="before")
    @classmethod
    def _split(cls, value):
        if isinstance(value, str):
            return [t.strip() for t in value.split(",") if t.strip()] if value.strip() else []
        return value

    @field_validator("station_tokens", "admin_tokens")
    @classmethod
    def _check_tokens(cls, tokens: list[str]) -> list[str]:
        for token in tokens:
            _check_token(token)
        return tokens

    @field_validator("model_path", "tokens_file")
    @classmethod
    def _must_exist(cls, path: Path | None) -> Path | None:
        if path is not None and not path.is_file():
            raise ValueError(f"no such file: {path}")
        return path

    @model_validator(mode="after")
    def _need_a_token(self) -> Settings:
        tokens = self.tokens()
        if not tokens:
            raise ValueError(
                "no tokens configured: set KNOWNGOOD_STATION_TOKENS / KNOWNGOOD_ADMIN_TOKENS (comma-separated) "
                "or KNOWNGOOD_TOKENS_FILE"
            )
        return self

    def tokens(self) -> dict[str, Caller]:
        """Every accepted bearer token and who it stands for; a token given twice with two roles is an error."""
        pairs = [("station", t, None) for t in self.station_tokens] + [("admin", t, None) for t in self.admin_tokens]
        if self.tokens_file is not None:
            pairs += read_tokens_file(self.tokens_file)
        out: dict[str, Caller] = {}
        for role, token, name in pairs:
            if token in out and out[token].role != role:
                raise ValueError(f"a token ({_label(role, token)}) is given both as station and as admin")
            out[token] = Caller(role=role, name=name or _label(role, token))
        return out


def _check_token(token: str) -> None:
    if not token or any(c.isspace() for c in token):
        raise ValueError("a token must be non-empty and hold no spaces")
    if len(token) < MIN_TOKEN_LENGTH:
        raise ValueError(f"a token must be at least {MIN_TOKEN_LENGTH} characters long (got {len(token)})")


def _label(role: str, token: str) -> str:
    """Names a token in the audit trail by a short fingerprint, never by the secret itself."""
    return f"{role}:{hashlib.sha256(token.encode()).hexdigest()[:8]}"


_ADMIN_LABEL = re.compile(r"\badmin:[0-9a-f]{8}\b")


def shown_to(viewer: Caller, value):
    """`value` (text, or JSON-like dicts and lists of it) as `viewer` may see it: a station token does not see the
    admin tokens' fingerprints (each is a 32-bit hint to the secret), only that an admin acted."""
    if viewer.is_admin:
        return value
    if isinstance(value, str):
        return _ADMIN_LABEL.sub("admin", value)
    if isinstance(value, dict):
        return {k: shown_to(viewer, v) for k, v in value.items()}
    if isinstance(value, list):
        return [shown_to(viewer, v) for v in value]
    return value


def read_tokens_file(path: Path) -> list[tuple[Role, str, str | None]]:
    """`<role> <token> [name]` per line; blank lines and '#' comments are skipped. Errors name the line."""
    out: list[tuple[Role, str, str | None]] = []
    for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        words = line.split("#", 1)[0].split()
        if not words:
            continue
        if len(words) not in (2, 3) or words[0] not in ("station", "admin"):
            raise ValueError(f"{path}:{number}: expected '<station|admin> <token> [name]'")
        try:
            _check_token(words[1])
        except ValueError as exc:
            raise ValueError(f"{path}:{number}: {exc}") from None
        out.append((words[0], words[1], words[2] if len(words) == 3 else None))
    return out


@lru_cache
def get_settings() -> Settings:
    """The process's settings, read once from the environment. Tests override this dependency."""
    return Settings()
