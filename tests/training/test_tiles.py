"""Large images: tiled inspection at the camera's own scale against the whole image shrunk to 128 px.

The demo's casting surface rendered at 512 px keeps the pixel scale of a 128 px render (`demo_parts.render_large`),
so a crack is 1-2 px wide: a tiled model sees it at full resolution, a 128 px model of the whole image sees it a
quarter as wide, below what the features resolve. Both models share every other setting and the training images;
the position-free term alone keeps the test fast (the GAN terms add nothing to what it shows). "Found" is judged
where the defect is: the heatmap inside its mask against the 99.9th percentile of the heatmaps of good images.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from knowngood.demo_parts import render_large
from knowngood.demo_parts.scenario import image_rng
from knowngood.training.config import ModelConfig, TrainConfig
from knowngood.training.detector import tile_boxes
from knowngood.training.folders import ImageSet
from knowngood.training.train import auto_size, scale_note, train_bundle
from PIL import Image

SIDE = 512
TILE = 128
MEMORY_ONLY = dict(pixel=0.0, kappa=0.0, perceptual=0.0, adversarial=0.0, memory=1.0)


class _Images(ImageSet):
    def fingerprint(self) -> str:
        return "rendered"


def _render(defect: str | None, index: int, split: int) -> tuple[np.ndarray, np.ndarray]:
    out = render_large("casting", defect, image_rng(7, "casting", split, 0, index), SIDE)
    return out.image.astype(np.float32)[None] / 255.0, out.mask


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    good = _Images(paths=[], images=[_render(None, i, 0)[0] for i in range(16)])
    train = TrainConfig(steps=2, minutes=0, seed=0, choose_terms=False, eval_every=1)
    folder = tmp_path_factory.mktemp("tiles")
    threads = torch.get_num_threads()
    torch.set_num_threads(min(threads, 2))
    try:
        tiled = train_bundle(
            good, folder / "tiled.kgm", model=ModelConfig(size=TILE, tile=TILE, **MEMORY_ONLY), train=train,
            progress=False,
        )  # fmt: skip
        whole = train_bundle(
            good, folder / "whole.kgm", model=ModelConfig(size=128, **MEMORY_ONLY), train=train, progress=False
        )
    finally:
        torch.set_num_threads(threads)
    return tiled, whole


def test_tiles_cover_the_image_with_overlap():
    boxes = tile_boxes((300, 520), 128)
    covered = np.zeros((300, 520), dtype=bool)
    for y, x in boxes:
        covered[y : y + 128, x : x + 128] = True
    assert covered.all()
    assert max(y for y, _ in boxes) == 300 - 128 and max(x for _, x in boxes) == 520 - 128  # flush with the edge
    assert tile_boxes((100, 90), 128) == [(0, 0)]  # smaller than a tile: one, padded


def test_a_few_pixel_defect_is_found_at_full_resolution_and_missed_at_128_px(models):
    tiled, whole = models
    cracks = [_render("crack", i, 2) for i in range(6)]
    goods = [_render(None, i, 1)[0] for i in range(6)]
    assert all(m.sum() < 200 for _, m in cracks)  # a few hundred pixels at most, in a 512 x 512 image
    found = {}
    for name, det in (("tiled", tiled), ("whole", whole)):
        det.use_onnx()
        reference = np.quantile(np.concatenate([r.heatmap.ravel() for r in det.inspect(goods)]), 0.999)
        results = det.inspect([im for im, _ in cracks])
        assert all(r.heatmap.shape == (SIDE, SIDE) for r in results)  # at the input's own resolution
        found[name] = sum(float(r.heatmap[m].max()) > reference for r, (_, m) in zip(results, cracks))
    # measured: tiled 4 of 6, whole image at 128 px 0 of 6
    assert found["tiled"] >= 3 and found["whole"] <= 1, found


def test_train_warns_when_small_defects_would_vanish(tmp_path, capsys):
    """`train` says so when whole images are shrunk far below the camera's scale (a 512 px image at 128 px: a
    2-px feature at the working size is 8 native px), and names the options that keep the scale."""
    from knowngood.training.cli import main

    good = tmp_path / "good"
    good.mkdir()
    rng = np.random.default_rng(0)
    for i in range(12):
        Image.fromarray(rng.integers(90, 160, (SIDE, SIDE), dtype=np.uint8)).save(good / f"{i:02d}.png")
    args = ["train", str(good), "-o", str(tmp_path / "m.kgm"), "--steps", "2", "--quiet", "--size", "128"]
    assert main(args) == 0
    err = capsys.readouterr().err
    assert f"about {SIDE} px on the long side and are seen at 128 px (4.0x smaller)" in err
    assert "--tile 128" in err and "--size 256" in err
    # at the camera's scale (tiled) or at a working size near the native one, nothing to say
    assert scale_note([(SIDE, SIDE)], ModelConfig(tile=TILE)) is None
    assert scale_note([(SIDE, SIDE)], ModelConfig(size=256)) is None


def test_auto_size_keeps_small_images_at_the_default_and_brings_large_ones_nearer_their_scale():
    """Without --size, images up to 2.5x the default keep it (elpv's 300 px cells: 128 px) and larger ones get the
    smallest multiple of 16 that shrinks them at most 2.5x, up to 256 px; never over 4x the smallest short side."""
    assert auto_size([(300, 300)]) == 128
    assert auto_size([(320, 320)]) == 128  # exactly 2.5x
    assert auto_size([(330, 330)]) == 144  # 132 px rounded up to a multiple of 16
    assert auto_size([(480, 640), (480, 640), (640, 480)]) == 256  # the long side, whichever it is
    assert auto_size([(500, 500), (500, 500), (2000, 2000)]) == 208  # the median, not the largest
    assert auto_size([(3000, 4000)]) == 256  # capped: larger images want --tile (`scale_note` says so)
    assert auto_size([(640, 640), (640, 640), (40, 40)]) == 160  # a 40 px image allows 160 px at most
    assert auto_size([]) == 128
    # each returned size is one the model accepts
    for side in range(16, 1200, 37):
        ModelConfig(size=auto_size([(side, side)]))


def test_train_without_size_works_nearer_the_images_scale(tmp_path, capsys, monkeypatch):
    """`train` on 512 px images without --size works at 208 px (512 / 2.5, rounded up to 16), says so, and has no
    shrinking to warn of; --size keeps the user's choice (the test above)."""
    from knowngood.training import bundle
    from knowngood.training.cli import main

    good = tmp_path / "good"
    good.mkdir()
    rng = np.random.default_rng(0)
    for i in range(12):
        Image.fromarray(rng.integers(90, 160, (SIDE, SIDE), dtype=np.uint8)).save(good / f"{i:02d}.png")
    out = tmp_path / "m.kgm"
    assert main(["train", str(good), "-o", str(out), "--steps", "2", "--quiet"]) == 0
    err = capsys.readouterr().err
    assert f"working size 208 px for images of about {SIDE} px" in err
    assert "smaller)" not in err
    det = bundle.load(out)[0]
    assert det.cfg.shape == (208, 208)
    # the images were held at 208 px from decoding on; held at 512 px as before, they give the very same bundle
    from knowngood.training import commands

    native, read = tmp_path / "native.kgm", commands.load_folder
    loaded = []

    def load_native(folder, *, shape, **kw):
        assert shape == (208, 208)  # what `train` would have reduced them to
        loaded.append(read(folder, **kw))
        return loaded[-1]

    monkeypatch.setattr(commands, "load_folder", load_native)
    assert main(["train", str(good), "-o", str(native), "--steps", "2", "--quiet"]) == 0
    assert loaded[0].images[0].shape == (1, SIDE, SIDE)
    again = bundle.load(native)[0]
    assert (again.model_id, again.threshold) == (det.model_id, det.threshold)


def test_tiled_train_reads_each_image_from_its_file_and_gives_the_same_bundle(tmp_path, monkeypatch):
    """`train --tile` leaves the images in their files (decoded one at a time for tiles, scores and drift
    features) and writes the very bundle it writes from images held in memory."""
    from knowngood.training import bundle, commands
    from knowngood.training.cli import main
    from knowngood.training.data import read_image
    from knowngood.training.folders import ImageFiles

    good = tmp_path / "good"
    good.mkdir()
    for i in range(12):
        Image.fromarray((_render(None, i, 0)[0][0, :300, :400] * 255).astype(np.uint8)).save(good / f"{i:02d}.png")
    read, sets = commands.load_folder, []

    def load(folder, *, in_files, held=False, **kw):
        sets.append(read(folder, in_files=in_files and not held, **kw))
        return sets[-1]

    monkeypatch.setattr(commands, "load_folder", load)
    args = ["train", str(good), "--tile", "128", "--steps", "2", "--quiet", "-o"]
    assert main([*args, str(tmp_path / "files.kgm")]) == 0
    assert isinstance(sets[0].images, ImageFiles) and sets[0].shapes == [(300, 400)] * 12
    np.testing.assert_array_equal(sets[0].images[3], read_image(good / "03.png"))
    monkeypatch.setattr(commands, "load_folder", lambda folder, **kw: load(folder, held=True, **kw))
    assert main([*args, str(tmp_path / "held.kgm")]) == 0
    assert isinstance(sets[1].images, list) and sets[1].images[0].shape == (1, 300, 400)
    files, held = bundle.load(tmp_path / "files.kgm")[0], bundle.load(tmp_path / "held.kgm")[0]
    assert files.cfg.tile == 128 and (files.model_id, files.threshold) == (held.model_id, held.threshold)
