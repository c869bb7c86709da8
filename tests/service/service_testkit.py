"""Helpers shared by the service tests and their fixtures: tokens, image bytes, request shortcuts and a real server
started with `knowngood serve` in a subprocess on a free loopback port."""

from __future__ import annotations

import io
import os
import socket
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import httpx
import numpy as np
from PIL import Image

# start-up exports the scoring graph to ONNX: seconds on a quiet machine, a minute or more on a loaded shared one
READY_SECONDS = 150
STATION = "station-token-0001"
ADMIN = "admin-token-000001"
STATION_AUTH = {"Authorization": f"Bearer {STATION}"}
ADMIN_AUTH = {"Authorization": f"Bearer {ADMIN}"}
CHANGE = {"operator": "Dana", "reason": "a test of the model routes"}  # swaps and rollbacks say who and why
OUTPUT = Path(__file__).resolve().parent / "output"  # screenshots and logs the lead can find (git-ignored)


def png_bytes(image: np.ndarray) -> bytes:
    """(1, H, W) or (3, H, W) float in [0, 1] -> PNG bytes."""
    arr = (np.clip(image, 0, 1) * 255 + 0.5).astype(np.uint8)
    arr = arr[0] if arr.shape[0] == 1 else arr.transpose(1, 2, 0)
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="PNG")
    return buf.getvalue()


def post_image(client, data: bytes, *, name: str = "part.png", auth=STATION_AUTH, **form):
    return client.post(
        "/v1/inspections", files={"image": (name, data, "application/octet-stream")}, data=form, headers=auth
    )


def row_count(client) -> int:
    return client.app.state.service.store.count_inspections()


# ---- the real server -------------------------------------------------------------------------------------------


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass
class LiveServer:
    url: str
    proc: subprocess.Popen
    db: Path
    data_dir: Path
    log: Path
    startup_s: float

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)


def start_server(
    bundle: Path, folder: Path, *, port: int | None = None, extra_env: dict | None = None, db: str | None = None
) -> LiveServer:
    """Runs `knowngood serve` (the installed console script) and waits until /readyz says 200. `db`: the audit
    store's URL (default: an SQLite file in `folder`)."""
    folder.mkdir(parents=True, exist_ok=True)
    port = port or free_port()
    log = folder / f"server-{port}.log"
    exe = Path(sys.executable).with_name("knowngood")
    cmd = [
        str(exe),
        "serve",
        str(bundle),
        "--port",
        str(port),
        "--db",
        db or str(folder / "audit.db"),
        "--data-dir",
        str(folder / "data"),
    ]
    env = {
        **os.environ,
        "KNOWNGOOD_STATION_TOKENS": STATION,
        "KNOWNGOOD_ADMIN_TOKENS": ADMIN,
        "KNOWNGOOD_TORCH_THREADS": "1",
        **(extra_env or {}),
    }
    start = time.perf_counter()
    with open(log, "ab") as out:
        proc = subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT, env=env, cwd=folder)
    url = f"http://127.0.0.1:{port}"
    while time.perf_counter() - start < READY_SECONDS:
        if proc.poll() is not None:
            raise RuntimeError(f"the server exited with {proc.returncode}:\n{log.read_text()}")
        try:
            if httpx.get(url + "/readyz", timeout=1).status_code == 200:
                return LiveServer(url, proc, folder / "audit.db", folder / "data", log, time.perf_counter() - start)
        except httpx.TransportError:
            pass
        time.sleep(0.05)
    proc.kill()
    raise RuntimeError(f"the server did not become ready in {READY_SECONDS} s:\n{log.read_text()}")
