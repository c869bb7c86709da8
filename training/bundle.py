"""The model bundle: one zip with manifest.json and weights.safetensors. Reading it never unpickles anything.

Layout of the weights: graph.* (encoder, generator, critic, standardisation), frechet.* (reference statistics).
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import zipfile
from pathlib import Path

import numpy as np
import torch
from knowngood.training import __version__, bundle_check
from knowngood.training.config import ModelConfig, from_dict
from knowngood.training.detector import Detector
from knowngood.training.errors import BadBundle, BadConfig
from knowngood.training.nets import build
from knowngood.training.perceptual import PerceptualNet
from knowngood.training.scoring import ScoringGraph
from safetensors.torch import load as st_load
from safetensors.torch import save as st_save

FORMAT = "knowngood-bundle"
# 5: model.memory_pool (the memory's patch stride; before it, every memory searched every 4 px);
# 4: the memory and adversarial terms (graph.memory*, graph.feature_critic.*), term weights, height, tile;
# 3: model.residual_shift; 2: the perceptual term (graph.perceptual.*, graph.feature_*)
FORMAT_VERSION = 5
_ZIP_TIME = (2020, 1, 1, 0, 0, 0)  # fixed entry times: same content -> same bytes
MAX_BUNDLE_BYTES = 512 * 1024 * 1024


def new_graph(cfg: ModelConfig, perceptual: PerceptualNet | None = None) -> ScoringGraph:
    """A scoring graph for cfg; without `perceptual`, an uninitialised one when a term of cfg uses it."""
    if perceptual is None and cfg.pretrained:
        perceptual = PerceptualNet()
    return ScoringGraph(cfg, *build(cfg), perceptual=perceptual)


def to_bytes(detector: Detector, frechet: dict[str, np.ndarray]) -> bytes:
    """Serialises a detector; `frechet` holds the reference arrays (train_mu, train_sigma, holdout_features)."""
    tensors = {f"graph.{k}": v.detach().contiguous() for k, v in detector.graph.state_dict().items()}
    tensors.update({f"frechet.{k}": torch.as_tensor(np.ascontiguousarray(v)) for k, v in frechet.items()})
    weights = st_save(tensors)
    manifest = dict(detector.manifest)
    manifest.update(format=FORMAT, format_version=FORMAT_VERSION, software_version=__version__)
    manifest["model_id"] = hashlib.sha256(weights).hexdigest()[:16]
    manifest["threshold"] = {**manifest.get("threshold", {}), "value": float(detector.threshold)}
    manifest["weights"] = {k: list(v.shape) for k, v in sorted(tensors.items())}
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        for name, data in (
            ("manifest.json", json.dumps(manifest, indent=2, sort_keys=True).encode()),
            ("weights.safetensors", weights),
        ):
            zf.writestr(zipfile.ZipInfo(name, date_time=_ZIP_TIME), data, compress_type=zipfile.ZIP_DEFLATED)
    return buf.getvalue()


def save(detector: Detector, frechet: dict[str, np.ndarray], path: Path) -> str:
    """Writes the bundle atomically (temp file + rename); returns its sha256."""
    data = to_bytes(detector, frechet)
    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_bytes(data)
    os.replace(tmp, path)
    return hashlib.sha256(data).hexdigest()


def load(path: Path) -> tuple[Detector, dict[str, np.ndarray]]:
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise BadBundle(f"{path}: cannot read ({exc.strerror})") from None
    return from_bytes(data, name=str(path))


def from_bytes(data: bytes, *, name: str = "bundle") -> tuple[Detector, dict[str, np.ndarray]]:
    """Validates everything (zip, manifest, format version, shapes, a test forward pass) before returning."""
    if len(data) > MAX_BUNDLE_BYTES:
        raise BadBundle(f"{name}: {len(data)} bytes is over the {MAX_BUNDLE_BYTES}-byte limit")
    manifest, weights = _read_zip(data, name)
    _check_manifest(manifest, name)
    manifest["model_id"] = hashlib.sha256(weights).hexdigest()[:16]  # from the content, whatever the file claims
    model = dict(manifest["model"])
    if manifest["format_version"] < 2:
        model.setdefault("perceptual", 0.0)  # format 1 predates the perceptual term
    if manifest["format_version"] < 3:
        model.setdefault("residual_shift", 0)  # its standardisation was fitted on the plain residual
    if manifest["format_version"] < 4:
        model.setdefault("memory", 0.0)  # formats 1-3 predate the memory and the adversarial term
        model.setdefault("adversarial", 0.0)
    try:
        cfg = from_dict(ModelConfig, model)
    except (BadConfig, TypeError) as exc:
        raise BadBundle(f"{name}: model settings are invalid ({exc})") from None
    try:
        tensors = st_load(weights)
    except Exception as exc:
        raise BadBundle(f"{name}: weights.safetensors is corrupt ({exc})") from None
    graph = new_graph(cfg)
    _load_graph(graph, tensors, name)
    frechet = {k.split(".", 1)[1]: v.numpy() for k, v in tensors.items() if k.startswith("frechet.")}
    threshold = float(manifest["threshold"]["value"])
    det = Detector(
        cfg=cfg, graph=graph, threshold=threshold, manifest=manifest, sha256=hashlib.sha256(data).hexdigest()
    )
    _test_forward(det, name)
    return det, frechet


def _read_zip(data: bytes, name: str) -> tuple[dict, bytes]:
    return bundle_check.read_members(data, name)


def _check_manifest(manifest: dict, name: str) -> None:
    bundle_check.check_manifest(manifest, name, fmt=FORMAT, newest=FORMAT_VERSION)


def _load_graph(graph: ScoringGraph, tensors: dict[str, torch.Tensor], name: str) -> None:
    state = {k.split(".", 1)[1]: v for k, v in tensors.items() if k.startswith("graph.")}
    expected = graph.state_dict()
    missing = sorted(set(expected) - set(state))
    extra = sorted(set(state) - set(expected))
    if missing or extra:
        raise BadBundle(f"{name}: weights do not match the model settings (missing {missing[:3]}, extra {extra[:3]})")
    for key, value in expected.items():
        if tuple(state[key].shape) != tuple(value.shape):
            raise BadBundle(f"{name}: weight {key} has shape {tuple(state[key].shape)}, expected {tuple(value.shape)}")
    graph.load_state_dict(state, strict=True)
    graph.eval()


def _test_forward(det: Detector, name: str) -> None:
    x = torch.full((1, det.cfg.channels, *det.cfg.shape), 0.5)
    scores, _ = det.score_batch(x)
    if not np.isfinite(scores).all():
        raise BadBundle(f"{name}: the model gives non-finite scores")
