"""The tuning report and heatmap overlays: files written, headline numbers and caution present, PNGs valid,
the page self-contained, and the summary's numbers equal to the metrics computed directly."""

import html
import io
import json
import re
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from training.heatmap import MAX_ALPHA, heatmap_png_bytes, overlay_png, overlay_rgb
from training.metrics import image_auroc, pixel_auroc, pro_score
from training.report import CAUTION, HoldoutResult, metrics_summary, write_report
from training.tuning import conformal_threshold, threshold_for_false_reject

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
# 12 good then 8 defective; at a 10 % false-reject target the threshold falls between 1.4 and 1.9, so the good 2.6
# is a false reject and the defective 0.2 and 1.0 are escapes
SCORES = [-1.2, -0.8, -0.5, -0.3, 0.0, 0.1, 0.3, 0.5, 0.7, 0.9, 1.4, 2.6, 1.0, 0.2, 1.9, 2.2, 2.8, 3.1, 3.5, 4.0]


def _holdout(with_masks=True, seed=0) -> HoldoutResult:
    """12 good and 8 defective images (two classes, mixed sizes and colour modes); defects are bright squares
    that the heatmap sees; scores from SCORES."""
    rng = np.random.default_rng(seed)
    paths, labels, classes, scores, images, heats, masks = [], [], [], [], [], [], []
    for i in range(20):
        bad = i >= 12
        h, w = (32, 32) if i % 3 else (40, 28)
        c = 3 if i % 4 == 0 else 1
        img = rng.uniform(0.3, 0.5, (c, h, w)).astype(np.float32)
        heat = rng.uniform(0, 1, (h, w)).astype(np.float32)
        mask = None
        if bad:
            mask = np.zeros((h, w), bool)
            mask[5:12, 8:15] = True
            img[:, mask] = 0.9
            heat[mask] += 0.8  # seen, but not perfectly: pixel AUROC and PRO below 1
        kind = "good" if not bad else ("scratch" if i % 2 else "dent")
        paths.append(Path(f"holdout/{'good' if not bad else 'defective/' + kind}/img_{i:02d}.png"))
        labels.append(int(bad))
        classes.append(kind)
        scores.append(SCORES[i])
        images.append(img)
        heats.append(heat)
        masks.append(mask if with_masks and i != 19 else None)  # one defective without a mask
    return HoldoutResult(paths, np.array(labels), classes, np.array(scores), images, heats, masks)


def test_report_writes_page_plots_and_gallery(tmp_path):
    h = _holdout()
    good, bad = h.scores[h.labels == 0], h.scores[h.labels == 1]
    choice = threshold_for_false_reject(good, bad, 0.1)
    page = write_report(tmp_path / "rep", h, choice, title="Line 3 <brackets>", model_info={"model_id": "m-123"})
    assert page == tmp_path / "rep" / "index.html" and page.is_file()
    text = page.read_text(encoding="utf-8")
    m = metrics_summary(h, choice)
    for key in ("image_auroc", "average_precision", "pixel_auroc", "pro"):
        assert f"{m[key]:.3f}" in text
    fr = m["false_reject"]
    assert f"{100 * fr['rate']:.1f} % ({fr['k']} / {fr['n']}; 95 % CI {100 * fr['low']:.1f}–" in text
    assert f"{choice.value:.4g} (method: false-reject" in text
    assert html.escape(CAUTION) in text and "decision support" in text
    assert "Line 3 &lt;brackets&gt;" in text and "<brackets>" not in text  # user text is escaped
    assert "m-123" in text
    assert "<th>Images: defective, dent</th><td>4</td>" in text
    assert not re.search(r"(src|href)=\"(https?:)?//", text)  # self-contained: nothing fetched from elsewhere

    srcs = re.findall(r'<img src="([^"]+)"', text)
    for name in ("roc.png", "precision_recall.png", "scores.png", "confusion.png", "catch_per_class.png"):
        assert name in srcs
    escapes = (h.labels == 1) & (h.scores <= choice.value)
    rejects = (h.labels == 0) & (h.scores > choice.value)
    assert escapes.any() and rejects.any()  # the fixture really exercises both galleries
    assert sum(s.startswith("gallery/escape_") and s.endswith("_overlay.png") for s in srcs) == min(8, escapes.sum())
    assert sum(s.startswith("gallery/false_reject_") and s.endswith("_overlay.png") for s in srcs) == min(
        8, rejects.sum()
    )
    for src in srcs:
        data = (page.parent / src).read_bytes()
        assert data.startswith(PNG_MAGIC)
        Image.open(io.BytesIO(data)).verify()


def test_gallery_shows_the_lowest_scoring_escape_first(tmp_path):
    h = _holdout()
    choice = threshold_for_false_reject(h.scores[h.labels == 0], h.scores[h.labels == 1], 0.1)
    text = write_report(tmp_path, h, choice, title="t", model_info={}).read_text(encoding="utf-8")
    escapes = np.flatnonzero((h.labels == 1) & (h.scores <= choice.value))
    order = escapes[np.argsort(h.scores[escapes])]  # lowest score (the worst escape) first
    figures = re.findall(r"<figure[^>]*>.*?</figure>", text)
    shown = [f for f in figures if "gallery/escape_" in f]
    assert len(shown) == len(order) == 2
    for fig, i in zip(shown, order, strict=True):
        assert h.paths[i].name in fig and f"score {h.scores[i]:.4g}" in fig


def test_summary_equals_direct_metrics_and_is_json():
    h = _holdout()
    choice = threshold_for_false_reject(h.scores[h.labels == 0], h.scores[h.labels == 1], 0.1)
    m = json.loads(json.dumps(metrics_summary(h, choice)))
    assert m["image_auroc"] == pytest.approx(image_auroc(h.labels, h.scores))
    # pixel metrics: every good image (no defect pixels) and the defectives that have a mask
    keep = [i for i in range(20) if h.labels[i] == 0 or h.masks[i] is not None]
    masks = [h.masks[i] if h.labels[i] else np.zeros(h.heatmaps[i].shape, bool) for i in keep]
    maps = [h.heatmaps[i] for i in keep]
    assert m["pixel_auroc"] == pytest.approx(pixel_auroc(masks, maps))
    assert m["pro"] == pytest.approx(pro_score(masks, maps, max_fpr=0.3))
    t = choice.value
    assert m["catch"]["k"] == int(((h.labels == 1) & (h.scores > t)).sum())
    assert m["false_reject"]["k"] == int(((h.labels == 0) & (h.scores > t)).sum())
    assert set(m["per_class_catch"]) == {"dent", "scratch"}
    assert m["n"] == {"good": 12, "defective": 8, "per_class": {"dent": 4, "good": 12, "scratch": 4}}


def test_report_without_masks_leaves_pixel_metrics_out(tmp_path):
    h = _holdout(with_masks=False)
    choice = threshold_for_false_reject(h.scores[h.labels == 0], h.scores[h.labels == 1], 0.1)
    m = metrics_summary(h, choice)
    assert m["pixel_auroc"] is None and m["pro"] is None
    text = write_report(tmp_path, h, choice, title="t", model_info={}).read_text(encoding="utf-8")
    assert "Pixel AUROC" not in text and "PRO" not in text
    assert "_mask.png" not in text


# ---------------------------------------------------------------- heatmap overlays


def test_overlay_leaves_cold_pixels_alone_and_tints_hot_ones():
    img = np.full((1, 4, 6), 0.5, np.float32)
    heat = np.zeros((4, 6), np.float32)
    heat[0, 0] = 10.0  # far above vmax: saturates at yellow with MAX_ALPHA
    heat[1, 1] = 1.0  # half of vmax: half-way from red to yellow, half the opacity
    out = overlay_rgb(img, heat, vmax=2.0)
    assert out.shape == (4, 6, 3) and out.dtype == np.uint8
    assert (out[2:] == 128).all()  # heat 0: the gray image, replicated to RGB
    a = MAX_ALPHA
    assert out[0, 0].tolist() == [round(255 * (0.5 * (1 - a) + a)), round(255 * (0.5 * (1 - a) + a)),
                                  round(255 * 0.5 * (1 - a))]  # fmt: skip
    a2 = MAX_ALPHA / 2
    assert out[1, 1].tolist() == pytest.approx([255 * (0.5 * (1 - a2) + a2), 255 * (0.5 * (1 - a2) + 0.5 * a2),
                                                255 * 0.5 * (1 - a2)], abs=1)  # fmt: skip


def test_overlay_png_round_trips_and_refuses_bad_shapes():
    rng = np.random.default_rng(0)
    img, heat = rng.random((3, 20, 30)).astype(np.float32), rng.random((20, 30)).astype(np.float32)
    data = heatmap_png_bytes(img, heat, 1.0)
    assert data.startswith(PNG_MAGIC)
    assert np.array_equal(np.asarray(Image.open(io.BytesIO(data))), overlay_rgb(img, heat, 1.0))
    assert overlay_png(img, heat, 1.0).size == (30, 20)  # PIL: (width, height)
    with pytest.raises(ValueError, match="must match"):
        overlay_rgb(img, heat.T, 1.0)
    with pytest.raises(ValueError, match="vmax"):
        overlay_rgb(img, heat, 0.0)
    with pytest.raises(ValueError, match="C = 1 or 3"):
        overlay_rgb(rng.random((2, 20, 30)), heat, 1.0)


def test_second_report_in_the_same_folder_drops_the_old_gallery(tmp_path):
    h = _holdout()
    good, bad = h.scores[h.labels == 0], h.scores[h.labels == 1]
    write_report(tmp_path, h, threshold_for_false_reject(good, bad, 0.1), title="t", model_info={})
    assert (tmp_path / "gallery" / "escape_02_image.png").exists()
    h.scores[h.labels == 1] += 10  # now nothing escapes
    write_report(tmp_path, h, threshold_for_false_reject(good, h.scores[h.labels == 1], 0.1), title="t", model_info={})
    assert not list((tmp_path / "gallery").glob("escape_*"))


def test_report_of_good_images_only_marks_missing_metrics(tmp_path):
    h = _holdout()
    keep = np.flatnonzero(h.labels == 0)
    good = HoldoutResult(
        [h.paths[i] for i in keep], h.labels[keep], [h.classes[i] for i in keep], h.scores[keep],
        [h.images[i] for i in keep], [h.heatmaps[i] for i in keep], [None] * len(keep),
    )  # fmt: skip
    choice = conformal_threshold(good.scores, 0.1)
    m = metrics_summary(good, choice)
    assert m["image_auroc"] is None and m["catch"] is None and m["per_class_catch"] == {}
    assert m["false_reject"]["k"] == int((good.scores > choice.value).sum())
    text = write_report(tmp_path, good, choice, title="t", model_info={}).read_text(encoding="utf-8")
    assert "<th>Image AUROC</th><td>n/a</td>" in text and "roc.png" not in text
    assert "conformal" in text
