"""The HTTP side of the commands that talk to a running service (`export-reviews`): GET requests with a bearer
token through the standard library's `urllib.request`, every failure one line; and where the token comes from.

The token never comes from the command line (it would show in the process list and the shell's history).
"""

from __future__ import annotations

import http.client
import json
import urllib.error
import urllib.parse
import urllib.request
from dataclasses import dataclass
from pathlib import Path

from knowngood.training.errors import KnowngoodError

TOKEN_ENV = "KNOWNGOOD_TOKEN"


class ServiceError(KnowngoodError):
    """The service refused the request, could not be reached, or answered outside its documented contract."""

    title = "Service error"

    def __init__(self, message: str, status: int | None = None):
        super().__init__(message)
        self.status = status


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    """urllib would send the bearer token on to wherever a redirect points: refuse redirects instead."""

    def redirect_request(self, req, fp, code, msg, headers, newurl):
        return None


@dataclass
class Client:
    """GET requests to one service with one bearer token; every failure is a one-line ServiceError."""

    url: str
    token: str
    timeout: float = 60.0

    def __post_init__(self) -> None:
        self.url = self.url.rstrip("/")
        self._opener = urllib.request.build_opener(_NoRedirect)

    def open(self, path: str, query: dict | None = None):
        full = self.url + path + (f"?{urllib.parse.urlencode(query)}" if query else "")
        request = urllib.request.Request(full, headers={"Authorization": f"Bearer {self.token}"})
        try:
            return self._opener.open(request, timeout=self.timeout)
        except urllib.error.HTTPError as exc:
            raise _refusal(exc, path) from None
        except urllib.error.URLError as exc:
            raise ServiceError(f"cannot reach the service at {self.url}: {exc.reason}") from None
        except OSError as exc:  # a timeout or a reset connection
            raise ServiceError(f"cannot reach the service at {self.url}: {exc}") from None

    def get_json(self, path: str, query: dict | None = None):
        try:
            with self.open(path, query) as response:
                body = response.read()
        except (OSError, http.client.HTTPException) as exc:  # the connection broke off mid-answer
            raise ServiceError(f"GET {path}: the answer broke off ({exc!r})") from None
        try:
            return json.loads(body)
        except ValueError:
            raise ServiceError(f"GET {path}: the answer is not JSON; is {self.url} a knowngood service?") from None


def _refusal(exc: urllib.error.HTTPError, path: str) -> ServiceError:
    """The problem+json `detail` of an error answer, on one line."""
    try:
        detail = json.loads(exc.read(65536)).get("detail") or exc.reason
    except (ValueError, AttributeError, OSError, http.client.HTTPException):
        detail = exc.reason
    detail = " ".join(str(detail).split())
    if exc.code in (401, 403):
        return ServiceError(f"the service refused the token ({exc.code}): {detail}", exc.code)
    if 300 <= exc.code < 400:
        where = exc.headers.get("Location", "elsewhere")
        return ServiceError(f"GET {path}: redirected to {where}; give that address with --url", exc.code)
    return ServiceError(f"GET {path}: {exc.code} {detail}", exc.code)


def read_token(token_file: Path | None, environment_token: str | None) -> str:
    """The bearer token: the first line of --token-file, else the environment's; never a command-line value."""
    if token_file is not None:
        try:
            lines = token_file.read_text(encoding="utf-8").splitlines()
        except UnicodeDecodeError:
            raise KnowngoodError(f"--token-file {token_file}: not a text file") from None
        token, source = (lines[0].strip() if lines else ""), f"--token-file {token_file}"
    else:
        token, source = (environment_token or "").strip(), TOKEN_ENV
    if not token:
        raise KnowngoodError(f"no token: set {TOKEN_ENV} or give --token-file FILE (its first line)")
    if any(c.isspace() or not c.isprintable() for c in token):
        raise KnowngoodError(f"{source}: the token holds spaces or control characters")
    return token
