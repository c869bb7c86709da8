"""Levers on the position-free memory, measured on the patch-memory peer (`peers.PatchMemoryPeer`, the memory term
without the GAN) so that each costs minutes, not a training run: the coarser stride that would meet the speed
goals, and features taken on an enlarged image, which fine textures might need.

    python -m tests.bench.memory_levers [--out bench_out/memory_levers.json] NAME ...   (datasets.NAMES)

Per dataset and variant: image AUROC of the map's maximum (PatchCore's score) and of the mean of its top 0.3 %
(knowngood's image score, `ModelConfig.top_fraction`), and the seconds per image of features + search, one thread.
These are the benchmark's own test splits: the figures are design evidence for the README's table of levers, not
independent test figures.
"""

from __future__ import annotations

import time

import numpy as np
from knowngood.training.config import ModelConfig
from knowngood.training.data import to_model_input
from sklearn.metrics import roc_auc_score

from tests.bench import datasets
from tests.bench.levers import lever_main
from tests.bench.peers import PatchMemoryPeer

SIZE = 128  # the benchmark's working size
TOP_FRACTION = ModelConfig.top_fraction  # 0.3 %
VARIANTS = {
    "stride 4 (default)": {},
    "stride 8": {"pool": 2},
    "features on the image enlarged 2x": {"feature_scale": 2},
}


def measure(ds: datasets.Dataset) -> dict:
    x_train = to_model_input(ds.train, size=SIZE, channels=ds.channels)
    x_test = to_model_input(ds.test, size=SIZE, channels=ds.channels)
    out = {}
    for name, kw in VARIANTS.items():
        peer = PatchMemoryPeer(**kw).fit(x_train)
        start = time.perf_counter()
        scores, maps = peer.score(x_test)
        seconds = (time.perf_counter() - start) / len(x_test)
        flat = maps.reshape(len(maps), -1)
        k = max(1, round(TOP_FRACTION * flat.shape[1]))
        top = np.sort(flat, axis=1)[:, -k:].mean(1)
        out[name] = {
            "auroc_max": round(float(roc_auc_score(ds.labels, scores)), 4),
            "auroc_top": round(float(roc_auc_score(ds.labels, top)), 4),
            "ms_per_image": round(seconds * 1000, 1),
        }
    return out


def main(argv: list[str] | None = None) -> int:
    return lever_main(
        argv,
        description=__doc__.splitlines()[0],
        out="bench_out/memory_levers.json",
        threads=1,
        measure=lambda name, args: measure(datasets.load(name, args.cache)),
    )


if __name__ == "__main__":
    raise SystemExit(main())
