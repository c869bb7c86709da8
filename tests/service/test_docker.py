"""The container files, checked statically (no Docker daemon needed): they parse, run `knowngood serve` as a
non-root user with a health check on /healthz, keep the model and the audit store on volumes, expose the port."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
import tomllib
import yaml

ROOT = Path(__file__).resolve().parents[2]
DOCKERFILE = ROOT / "docker" / "Dockerfile"
COMPOSE = ROOT / "docker" / "compose.yaml"


def instructions(path: Path) -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) pairs with continuation lines joined and comments dropped."""
    out, pending = [], ""
    for line in path.read_text().splitlines():
        stripped = line.strip()
        if not pending and (not stripped or stripped.startswith("#")):
            continue
        if stripped.endswith("\\"):
            pending += stripped[:-1] + " "
            continue
        full = pending + stripped
        pending = ""
        word, _, rest = full.partition(" ")
        out.append((word.upper(), rest.strip()))
    assert not pending, "a continuation line runs off the end of the file"
    return out


@pytest.fixture(scope="module")
def docker() -> list[tuple[str, str]]:
    return instructions(DOCKERFILE)


def _all(docker, word: str) -> list[str]:
    return [args for w, args in docker if w == word]


def test_dockerfile_parses_into_known_instructions(docker):
    known = {
        "ARG",
        "FROM",
        "ENV",
        "WORKDIR",
        "RUN",
        "COPY",
        "USER",
        "VOLUME",
        "EXPOSE",
        "HEALTHCHECK",
        "ENTRYPOINT",
        "CMD",
        "LABEL",
    }
    assert docker and {w for w, _ in docker} <= known
    assert [w for w, _ in docker if w != "ARG"][0] == "FROM"


def test_python_slim_base_and_cpu_torch_from_a_build_arg(docker):
    [base] = _all(docker, "FROM")
    assert re.fullmatch(r"python:\$\{PYTHON_VERSION\}-slim|python:3\.\d+-slim", base)
    args = dict(a.split("=", 1) for a in _all(docker, "ARG") if "=" in a)
    assert args["TORCH_INDEX_URL"].endswith("/cpu")
    torch_runs = [r for r in _all(docker, "RUN") if '--index-url "${TORCH_INDEX_URL}"' in r]
    assert len(torch_runs) == 1
    deps = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["dependencies"]
    for name in ("torch", "torchvision"):  # the same pins as the project, so `pip install .` keeps the CPU wheels
        [spec] = [d for d in deps if re.match(rf"{name}\b", d)]
        assert f'"{spec}"' in torch_runs[0], name


def test_runs_as_a_non_root_user(docker):
    users = _all(docker, "USER")
    assert users, "no USER instruction"
    user = users[-1].split(":")[0]
    assert user not in ("root", "0")
    index = [w for w, _ in docker].index("USER")
    assert all(w != "RUN" for w, _ in docker[index:]), "nothing should run as root after USER"


def test_health_check_on_healthz(docker):
    [check] = _all(docker, "HEALTHCHECK")
    assert "/healthz" in check and "--interval=" in check and "CMD" in check
    port = dict(kv.split("=", 1) for e in _all(docker, "ENV") for kv in e.split())["KNOWNGOOD_PORT"]
    assert f"127.0.0.1:{port}/healthz" in check


def test_model_and_database_on_volumes_and_port_exposed(docker):
    [volumes] = _all(docker, "VOLUME")
    assert set(json.loads(volumes)) == {"/data", "/models"}
    env = dict(kv.split("=", 1) for e in _all(docker, "ENV") for kv in e.split())
    assert env["KNOWNGOOD_DB"].startswith("/data/") and env["KNOWNGOOD_DATA_DIR"].startswith("/data/")
    assert env["KNOWNGOOD_HOST"] == "0.0.0.0"
    assert _all(docker, "EXPOSE") == [env["KNOWNGOOD_PORT"]]
    assert json.loads(_all(docker, "CMD")[0])[0].startswith("/models/")


def test_entrypoint_runs_knowngood_serve(docker):
    [entry] = _all(docker, "ENTRYPOINT")
    assert json.loads(entry) == ["knowngood", "serve"]  # exec form: signals reach uvicorn for a clean stop


def test_copied_sources_exist(docker):
    readme = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["readme"]
    sources = [src for c in _all(docker, "COPY") for src in c.split()[:-1]]
    assert readme in sources  # the build needs the readme pyproject names
    for src in sources:
        if src != readme:  # the README is the lead's; the build stops with a clear message if it is missing
            assert (ROOT / src).exists(), src
    lines = (ROOT / "docker" / "Dockerfile.dockerignore").read_text().splitlines()
    ignore = [line.strip().rstrip("/") for line in lines if line.strip() and not line.startswith("#")]
    assert ignore[0] == "*"  # everything is left out, then what the image needs is let back in
    assert all(f"!{src.rstrip('/')}" in ignore for src in sources)


@pytest.fixture(scope="module")
def compose() -> dict:
    return yaml.safe_load(COMPOSE.read_text())


def test_compose_builds_this_dockerfile_and_mounts_volumes(compose, docker):
    [(name, svc)] = compose["services"].items()
    assert svc["build"] == {"context": "..", "dockerfile": "docker/Dockerfile"}
    assert (COMPOSE.parent / svc["build"]["context"] / svc["build"]["dockerfile"]).resolve() == DOCKERFILE
    mounts = {v.split(":")[1]: v.split(":")[0] for v in svc["volumes"]}
    assert set(mounts) == {"/data", "/models"}
    assert mounts["/data"] in compose["volumes"]  # a named volume: the audit store outlives the container
    assert svc["volumes"][[v.split(":")[1] for v in svc["volumes"]].index("/models")].endswith(":ro")
    assert svc["ports"] == ["8000:8000"]
    assert svc["command"] == json.loads(_all(docker, "CMD")[0])
    assert "KNOWNGOOD_ADMIN_TOKENS" in svc["environment"]
    assert ":?" in svc["environment"]["KNOWNGOOD_ADMIN_TOKENS"]  # compose refuses to start without a token


def test_the_package_index_url_is_written_only_in_the_dockerfile():
    for path in (COMPOSE, ROOT / "docker" / "Dockerfile.dockerignore"):
        assert "download.pytorch.org" not in path.read_text()
