"""A tiled model served over REST: every tile of every image scored in one batch, each image stitched back, the
verdict and the stored heatmap the same as `Detector.inspect` gives for that image."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import torch
from knowngood.training import bundle
from knowngood.training.config import ModelConfig
from knowngood.training.data import decode_image
from knowngood.training.detector import Detector
from knowngood.training.perceptual import load_pretrained
from service_testkit import STATION_AUTH, png_bytes


@pytest.fixture(scope="module")
def tiled_bundle(tmp_path_factory, tiny_good_images):
    """A 32 px model of 48 px tiles (resized to 32), fitted on tiles of the tiny good images."""
    torch.manual_seed(0)
    cfg = ModelConfig(size=32, tile=48, channels=1, width=8, z_channels=4, memory_size=128)
    graph = bundle.new_graph(cfg, load_pretrained())
    big = [np.kron(im, np.ones((1, 2, 2), dtype=np.float32)) for im in tiny_good_images]  # 64 px images
    det = Detector(cfg=cfg, graph=graph, threshold=3.0, manifest={"model": dataclasses.asdict(cfg)})
    tiles = torch.cat([det.prepare_one(im).x for im in big])
    graph.fit_features(tiles[: len(tiles) // 2])
    graph.fit_standardisation(tiles)
    det.manifest["threshold"] = {"method": "fixed", "value": 3.0}
    emb = det.embed_images(big)
    frechet = {"train_mu": emb.mean(0), "train_sigma": np.cov(emb, rowvar=False), "holdout_features": emb}
    path = tmp_path_factory.mktemp("tiled") / "tiled.kgm"
    bundle.save(det, frechet, path)
    return path, big


def test_a_tiled_model_scores_stitches_and_stores_like_inspect(make_client, tiled_bundle):
    path, big = tiled_bundle
    client = make_client(model_path=path)
    images = [big[0], np.pad(big[1], ((0, 0), (0, 30), (0, 50)), mode="reflect")]  # 64 x 64 and 94 x 114
    pngs = [png_bytes(im) for im in images]
    expected = bundle.load(path)[0].inspect([decode_image(p, name="png") for p in pngs])  # what the service decodes
    files = [("images", (f"{i}.png", p)) for i, p in enumerate(pngs)]
    r = client.post("/v1/inspections/batch", files=files, headers=STATION_AUTH)
    assert r.status_code == 200, r.text
    rows = r.json()["items"]
    assert len(rows) == 2
    for row, want, im in zip(rows, expected, images):
        assert row["score"] == pytest.approx(want.score, rel=1e-4, abs=1e-4)
        assert row["verdict"] == want.verdict
        assert (row["image"]["height"], row["image"]["width"]) == im.shape[-2:]
        png = client.get(f"/v1/inspections/{row['id']}/heatmap.png", headers=STATION_AUTH)
        assert png.status_code == 200 and png.content[:8] == b"\x89PNG\r\n\x1a\n"
