"""Service fixtures: settings on tmp_path, a TestClient around a fresh app, and a real server in a subprocess.
Plain helpers live in service_testkit.py."""

from __future__ import annotations

import dataclasses
import os
import warnings
from pathlib import Path

import postgres_server
import pytest
import torch
from knowngood.service.app import create_app
from knowngood.service.settings import Settings, get_settings
from knowngood.training import bundle
from service_testkit import ADMIN, STATION, png_bytes, start_server

with warnings.catch_warnings():
    # Starlette asks for the `httpx2` package and warns when only `httpx` is installed; both work the same here.
    warnings.simplefilter("ignore", DeprecationWarning)
    from fastapi.testclient import TestClient


@pytest.fixture
def good_png(tiny_good_images) -> bytes:
    return png_bytes(tiny_good_images[0])


@pytest.fixture
def make_settings(tmp_path, tiny_bundle):
    """Settings for a test: its own database and data folder; PyTorch on one thread (fast start, a shared CPU)."""

    def make(**overrides) -> Settings:
        values = dict(
            model_path=tiny_bundle,
            db=tmp_path / "audit.db",
            data_dir=tmp_path / "data",
            station_tokens=[STATION],
            admin_tokens=[ADMIN],
            torch_threads=1,
            onnx=False,
            drift_min_images=8,
        )
        values.update(overrides)
        return Settings(**values)

    return make


@pytest.fixture
def make_client(make_settings):
    """make_client(**settings) -> a started TestClient (lifespan run); closed at the end of the test."""
    clients = []

    def make(**overrides) -> TestClient:
        settings = make_settings(**overrides)
        app = create_app()
        app.dependency_overrides[get_settings] = lambda: settings
        client = TestClient(app)
        client.__enter__()
        clients.append(client)
        return client

    yield make
    for client in clients:
        client.__exit__(None, None, None)


@pytest.fixture
def client(make_client) -> TestClient:
    return make_client()


@pytest.fixture
def live_server(tiny_bundle, tmp_path):
    server = start_server(tiny_bundle, tmp_path / "server")
    yield server
    server.stop()


@pytest.fixture(scope="session")
def second_bundle(tmp_path_factory, tiny_bundle) -> Path:
    """Another valid bundle (other weights, so another model id and sha256, threshold 2.5) for swaps."""
    det, frechet = bundle.load(tiny_bundle)
    torch.manual_seed(1)
    graph = bundle.new_graph(det.cfg)
    graph.load_state_dict({**graph.state_dict(), "term_mean": det.graph.term_mean, "term_std": det.graph.term_std})
    other = dataclasses.replace(det, graph=graph, threshold=2.5)
    path = tmp_path_factory.mktemp("second") / "second.kgm"
    bundle.save(other, frechet, path)
    return path


@pytest.fixture(scope="session")
def postgres():
    """A throwaway PostgreSQL server for the session. Skipped where none can be started, except when
    KNOWNGOOD_REQUIRE_POSTGRES=1 (CI), where that is a failure."""
    try:
        server = postgres_server.start()
    except RuntimeError as exc:
        if os.environ.get("KNOWNGOOD_REQUIRE_POSTGRES") == "1":
            pytest.fail(f"KNOWNGOOD_REQUIRE_POSTGRES=1 but no PostgreSQL server could be started: {exc}")
        pytest.skip(f"no PostgreSQL server can be started here: {exc}")
    yield server
    server.stop()


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request, tmp_path) -> str:
    """A fresh audit database: an SQLite file, then a new database on the PostgreSQL server."""
    if request.param == "sqlite":
        return str(tmp_path / "audit.db")
    return request.getfixturevalue("postgres").new_database()
