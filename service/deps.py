"""What routes depend on, as `Annotated` aliases so a signature reads like prose: the service state, the caller
(bearer token and role) and the current model."""

from __future__ import annotations

import datetime as dt
import hashlib
import threading
from dataclasses import dataclass, field
from typing import Annotated

from fastapi import Depends, Query, Request
from fastapi.exceptions import RequestValidationError
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from knowngood.service.admission import Stage
from knowngood.service.files import FileStore
from knowngood.service.metrics import Metrics
from knowngood.service.part_types import PartTypes
from knowngood.service.problems import Problem
from knowngood.service.restore import Models
from knowngood.service.settings import Caller, Settings
from knowngood.service.store import Store, to_iso


@dataclass
class ServiceState:
    """Everything the lifespan opens, in one place on `app.state.service`."""

    settings: Settings
    store: Store
    files: FileStore
    parts: PartTypes  # one model slot per part type
    models: Models  # bundles readied for serving, by sha256
    metrics: Metrics
    tokens: dict[str, Caller]  # sha256 of the token -> caller
    decoding: Stage  # at most max_decodes images decoded at once, max_queue waiting
    scoring: Stage  # one forward pass at a time (torch threads do the parallel work, and two passes fighting over
    # two cores are slower than one after the other), max_queue waiting
    prune_lock: threading.Lock = field(default_factory=threading.Lock)
    since_prune: int = 0  # inspections since the last retention sweep

    @staticmethod
    def token_key(token: str) -> str:
        return hashlib.sha256(token.encode()).hexdigest()

    def caller(self, authorization: str | None) -> Caller:
        """The caller an `Authorization` header names; Problem(401) if none. The one token check, used before a
        request's body is read (`limits.BodyGate`) and by the route dependencies."""
        scheme, _, token = (authorization or "").partition(" ")
        if scheme.lower() != "bearer" or not token.strip():
            raise Problem(
                401,
                "this route needs a bearer token: send 'Authorization: Bearer <token>'",
                headers={"WWW-Authenticate": "Bearer"},
            )
        caller = self.tokens.get(self.token_key(token.strip()))
        if caller is None:
            raise Problem(
                401, "the bearer token is not recognised", headers={"WWW-Authenticate": 'Bearer error="invalid_token"'}
            )
        return caller


async def get_state(request: Request) -> ServiceState:
    return request.app.state.service


State = Annotated[ServiceState, Depends(get_state)]
_bearer = HTTPBearer(auto_error=False, description="a station or admin token (KNOWNGOOD_*_TOKENS)")


async def get_caller(
    request: Request, state: State, credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)]
) -> Caller:
    # `credentials` puts the scheme in the OpenAPI document; the header itself is checked in one place
    return state.caller(request.headers.get("authorization"))


def check_admin(caller: Caller) -> Caller:
    if not caller.is_admin:
        raise Problem(403, f"this route needs an admin token; the token sent ({caller.name}) has the station role")
    return caller


async def require_admin(caller: Annotated[Caller, Depends(get_caller)]) -> Caller:
    return check_admin(caller)


@dataclass(frozen=True)
class TimeWindow:
    """since <= time < until as the store's UTC ISO text; either may be None."""

    since: str | None
    until: str | None


def _invalid(field: str, message: str) -> RequestValidationError:
    return RequestValidationError([{"loc": ("query", field), "msg": message, "type": "value_error"}])


def _iso(field: str, t: dt.datetime | None) -> str | None:
    if t is None:
        return None
    try:
        return to_iso(t)
    except (OverflowError, ValueError):  # e.g. 0001-01-01T00:00:00+01:00 is before year 1 in UTC
        raise _invalid(field, f"{t.isoformat()} is out of range once converted to UTC") from None


def get_window(
    since: Annotated[dt.datetime | None, Query(description="from this time on (UTC if no offset is given)")] = None,
    until: Annotated[dt.datetime | None, Query(description="before this time (UTC if no offset is given)")] = None,
) -> TimeWindow:
    """The one check of a time range, for every route that takes one: out-of-range times and until <= since are
    422s."""
    window = TimeWindow(_iso("since", since), _iso("until", until))
    if window.since and window.until and window.until <= window.since:
        raise _invalid("until", f"until ({until.isoformat()}) must be after since ({since.isoformat()})")
    return window


StationCaller = Annotated[Caller, Depends(get_caller)]  # station or admin
AdminCaller = Annotated[Caller, Depends(require_admin)]
Window = Annotated[TimeWindow, Depends(get_window)]
