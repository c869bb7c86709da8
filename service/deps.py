"""What routes depend on, as `Annotated` aliases so a signature reads like prose: the service state, the caller
(bearer token and role) and the current model."""

from __future__ import annotations

import hashlib
import threading
from dataclasses import dataclass, field
from typing import Annotated

from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from service.files import FileStore
from service.metrics import Metrics
from service.model_slot import LoadedModel, ModelSlot
from service.problems import Problem
from service.settings import Caller, Settings, get_settings
from service.store import SqliteStore


@dataclass
class ServiceState:
    """Everything the lifespan opens, in one place on `app.state.service`."""

    settings: Settings
    store: SqliteStore
    files: FileStore
    slot: ModelSlot
    metrics: Metrics
    tokens: dict[str, Caller]  # sha256 of the token -> caller
    gate: threading.Lock = field(default_factory=threading.Lock)  # one forward pass at a time: torch threads do the
    # parallel work, and two passes fighting over two cores are slower than one after the other
    prune_lock: threading.Lock = field(default_factory=threading.Lock)
    since_prune: int = 0  # inspections since the last retention sweep

    @staticmethod
    def token_key(token: str) -> str:
        return hashlib.sha256(token.encode()).hexdigest()


async def get_state(request: Request) -> ServiceState:
    return request.app.state.service


State = Annotated[ServiceState, Depends(get_state)]
SettingsDep = Annotated[Settings, Depends(get_settings)]
_bearer = HTTPBearer(auto_error=False, description="a station or admin token (KNOWNGOOD_*_TOKENS)")


async def get_caller(
    state: State, credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)]
) -> Caller:
    challenge = {"WWW-Authenticate": "Bearer"}
    if credentials is None or not credentials.credentials:
        raise Problem(401, "this route needs a bearer token: send 'Authorization: Bearer <token>'", headers=challenge)
    caller = state.tokens.get(ServiceState.token_key(credentials.credentials))
    if caller is None:
        raise Problem(
            401, "the bearer token is not recognised", headers={"WWW-Authenticate": 'Bearer error="invalid_token"'}
        )
    return caller


async def require_admin(caller: Annotated[Caller, Depends(get_caller)]) -> Caller:
    if not caller.is_admin:
        raise Problem(403, f"this route needs an admin token; the token sent ({caller.name}) has the station role")
    return caller


async def get_model(state: State) -> LoadedModel:
    return state.slot.get()


StationCaller = Annotated[Caller, Depends(get_caller)]  # station or admin
AdminCaller = Annotated[Caller, Depends(require_admin)]
CurrentModel = Annotated[LoadedModel, Depends(get_model)]
