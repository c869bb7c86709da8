"""The tuning report and heatmap overlays: files written, headline numbers and caution present, PNGs valid,
the page self-contained, and the summary's numbers equal to the metrics computed directly."""

import dataclasses
import datetime as dt
import hashlib
import html
import io
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from knowngood.training import __version__, bundle
from knowngood.training.cli import main
from knowngood.training.folders import fingerprint
from knowngood.training.heatmap import MAX_ALPHA, heatmap_png_bytes, overlay_png, overlay_rgb
from knowngood.training.metrics import image_auroc, pixel_auroc, pro_score
from knowngood.training.report import CAUTION, HoldoutResult, metrics_summary, write_report
from knowngood.training.tuning import conformal_threshold, threshold_for_false_reject
from PIL import Image

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
    assert sum(s.startswith("gallery/escape_") and s.endswith("_heatmap.png") for s in srcs) == min(8, escapes.sum())
    assert sum(s.startswith("gallery/false_reject_") and s.endswith("_heatmap.png") for s in srcs) == min(
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
    rows = re.findall(r"<tr>.*?</tr>", text)
    shown = [row for row in rows if "gallery/escape_" in row]
    assert len(shown) == len(order) == 2
    for row, i in zip(shown, order, strict=True):
        assert h.paths[i].name in row and f"score {h.scores[i]:.4g}" in row


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


# ---------------------------------------------------------------- warnings, model table and gallery, parsed


class _Page(HTMLParser):
    """What a reader sees of a report page: table rows (header cell -> data cell), gallery tables' column heads,
    links with the pictures inside them, and the warning paragraphs."""

    def __init__(self, text: str):
        super().__init__()
        self.rows: dict[str, str] = {}
        self.gallery_heads: list[list[str]] = []
        self.links: list[tuple[str, str]] = []  # (href, src of the img inside)
        self.warnings: list[str] = []
        self._cell: list[str] | None = None
        self._row: list[tuple[str, str]] = []
        self._href: str | None = None
        self._in_gallery = False
        self._warning: list[str] | None = None
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table":
            self._in_gallery = a.get("class") == "gallery"
            if self._in_gallery:
                self.gallery_heads.append([])
        elif tag == "tr":
            self._row = []
        elif tag in ("th", "td"):
            self._cell = []
        elif tag == "a":
            self._href = a.get("href")
        elif tag == "img" and self._href is not None:
            self.links.append((self._href, a.get("src")))
        elif tag == "p" and a.get("class") == "warning":
            self._warning = []

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)
        if self._warning is not None:
            self._warning.append(data)

    def handle_endtag(self, tag):
        if tag in ("th", "td") and self._cell is not None:
            self._row.append((tag, "".join(self._cell).strip()))
            self._cell = None
        elif tag == "tr":
            if len(self._row) == 2 and self._row[0][0] == "th" and self._row[1][0] == "td":
                self.rows[self._row[0][1]] = self._row[1][1]
            if self._in_gallery and all(kind == "th" for kind, _ in self._row):
                self.gallery_heads[-1] = [text for _, text in self._row]
        elif tag == "a":
            self._href = None
        elif tag == "p" and self._warning is not None:
            self.warnings.append("".join(self._warning).strip())
            self._warning = None


def test_summary_warns_about_a_swapped_holdout_and_few_masks(tmp_path):
    h = _holdout()
    choice = threshold_for_false_reject(h.scores[h.labels == 0], h.scores[h.labels == 1], 0.1)
    m = metrics_summary(h, choice)
    assert (
        m["masks"] == {"with_mask": 7, "defective": 8, "maps_reduced": 0} and m["warnings"] == []
    )  # 7 of 8: nothing doubtful
    h.scores = -h.scores  # defective now score lower than good: as if the folders were swapped
    h.masks = [mask if i < 15 else None for i, mask in enumerate(h.masks)]  # masks for 3 of the 8 defective
    m = metrics_summary(h, threshold_for_false_reject(h.scores[h.labels == 0], h.scores[h.labels == 1], 0.1))
    assert m["image_auroc"] < 0.5 and m["masks"] == {"with_mask": 3, "defective": 8, "maps_reduced": 0}
    assert len(m["warnings"]) == 2
    assert "below 0.5" in m["warnings"][0] and "swapped" in m["warnings"][0]
    assert "from masks of 3 of 8 defective images, fewer than half" in m["warnings"][1]
    page = _Page(write_report(tmp_path, h, choice, title="t", model_info={}).read_text(encoding="utf-8"))
    assert [w.removeprefix("Warning. ") for w in page.warnings] == m["warnings"]
    assert page.rows["Pixel AUROC"].endswith("(from masks of 3 of 8 defective images)")


def _png(path: Path, image: np.ndarray) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray((np.clip(image[0], 0, 1) * 255).round().astype(np.uint8)).save(path)


def test_tune_report_names_its_model_data_and_software(tiny_bundle, tiny_good_images, tmp_path):
    # a bundle as train writes it: steps, time and the training folder in its manifest
    det, frechet = bundle.load(tiny_bundle)
    manifest = {
        **det.manifest,
        "training": {"steps_done": 7, "seconds": 12.3},
        "folders": {"training": "line3/good", "holdout": None},
        "fingerprints": {"training": "ab" * 32, "holdout": None},
    }
    model = tmp_path / "trained.kgm"
    bundle.save(dataclasses.replace(det, manifest=manifest), frechet, model)
    good, bad, masks = tmp_path / "holdout" / "good", tmp_path / "holdout" / "defective", tmp_path / "holdout" / "masks"
    for i, img in enumerate(tiny_good_images[12:]):
        _png(good / f"{i:04d}.png", img)
    for i, img in enumerate(tiny_good_images[:4]):
        dent = img.copy()
        dent[:, 4 + 2 * i : 12 + 2 * i, 6:14] = 1.0  # a bright square the model has never seen
        _png(bad / "dent" / f"{i:04d}.png", dent)
    mask = np.zeros((1, 32, 32), np.float32)
    mask[:, 4:12, 6:14] = 1
    _png(masks / "dent" / "0000.png", mask)  # one mask for four defective images
    out, report = tmp_path / "tuned.kgm", tmp_path / "report"
    args = ["tune", str(model), "--good", str(good), "--defective", str(bad), "--masks", str(masks)]
    assert main([*args, "--target-catch", "0.5", "--report", str(report), "-o", str(out)]) == 0

    page = _Page((report / "index.html").read_text(encoding="utf-8"))
    tuned = bundle.load(out)[0]
    rows = page.rows
    written = dt.datetime.strptime(rows["Report written"], "%Y-%m-%d %H:%M UTC").replace(tzinfo=dt.timezone.utc)
    assert abs(dt.datetime.now(dt.timezone.utc) - written) < dt.timedelta(minutes=10)
    assert rows["Software"] == f"knowngood {__version__}"
    assert rows["Model id"] == tuned.model_id == det.model_id  # the weights did not change
    assert rows["Revision"] == tuned.revision != det.revision  # the threshold did
    assert rows["Bundle sha256"] == hashlib.sha256(out.read_bytes()).hexdigest()
    assert rows["Training images"] == f"line3/good (fingerprint {'ab' * 32})"
    assert rows["Training"] == "7 steps in 12 s"
    holdout_print = fingerprint(sorted(good.glob("*.png")) + sorted(bad.rglob("*.png")))
    assert rows["Holdout images"] == f"good {good}, defective {bad} (fingerprint {holdout_print})"
    assert rows["Holdout masks"] == str(masks)
    assert "Terms" in rows
    assert rows["Pixel AUROC"].endswith("(from masks of 1 of 4 defective images)")
    assert any("fewer than half" in w for w in page.warnings)

    # the gallery: one table per kind of miss with columns image / heatmap / mask, every thumbnail a link to a
    # picture larger than the 128 px it is shown at
    assert page.gallery_heads and all(head[-3:] == ["image", "heatmap", "mask"] for head in page.gallery_heads)
    gallery = [(href, src) for href, src in page.links if src.startswith("gallery/")]
    assert gallery  # a 50 % catch target lets the lowest-scoring defective images pass: escapes to show
    for href, src in gallery:
        assert href == src
        with Image.open(report / href) as picture:
            assert max(picture.size) >= 512 > 128  # the 32 px images, enlarged 16x


def test_the_holdout_stays_in_its_files_and_scores_as_its_decoded_images(tiny_bundle, tmp_path):
    """`load_holdout` keeps only paths (`ImageFiles`: a holdout of 5 MP images held as float32 was 6.4 GB for 48
    of them, measured) and scores them one decoded image at a time: the same scores and heatmaps, bit for bit, as
    `Detector.inspect` of the decoded images in one list, for mixed sizes and colour modes; its gallery decodes
    the pictures it shows."""
    from knowngood.training.data import read_image
    from knowngood.training.folders import ImageFiles
    from knowngood.training.holdout import load_holdout

    det = bundle.load(tiny_bundle)[0]
    rng = np.random.default_rng(7)
    root = tmp_path / "holdout"
    for i in range(6):
        path = root / ("good" if i < 3 else "defective/dent") / f"{i}.png"
        path.parent.mkdir(parents=True, exist_ok=True)
        shape = ((48, 64, 3) if i % 2 else (40, 40)) if i % 3 else (32, 32)
        Image.fromarray(rng.integers(50, 200, shape, dtype=np.uint8)).save(path)
    holdout = load_holdout(det, root / "good", root / "defective")
    assert isinstance(holdout.images, ImageFiles)
    decoded = [read_image(p, min_side=1) for p in holdout.paths]
    assert {im.shape[0] for im in decoded} == {1, 3}
    want = det.inspect(decoded)
    assert np.array_equal(holdout.scores, [r.score for r in want])
    assert all(np.array_equal(a, r.heatmap) for a, r in zip(holdout.heatmaps, want, strict=True))
    assert [h.shape for h in holdout.heatmaps] == [im.shape[-2:] for im in decoded]
    choice = threshold_for_false_reject(holdout.scores[:3], holdout.scores[3:], 0.5)
    write_report(tmp_path / "r", holdout, choice, title="t", model_info={})
    shown = list((tmp_path / "r" / "gallery").glob("*_image.png"))
    assert len(shown) == int((holdout.scores[:3] > choice.value).sum() + (holdout.scores[3:] <= choice.value).sum())


def test_a_multi_megapixel_holdout_holds_its_heatmaps_and_masks_at_about_the_map_limit(
    tiny_bundle, tmp_path, monkeypatch
):
    """`load_holdout` holds each heatmap of an image over `MAP_PIXELS` reduced to about that many pixels, aspect
    ratio kept, and its mask at the same shape, a 1 px scratch kept; scores are those of the whole images, the same
    as `Detector.inspect`'s, and the gallery shows the image at its map's size. (The limit is lowered here so
    small files stand for 5 MP ones.)"""
    from knowngood.training import holdout as hold
    from knowngood.training.data import read_image

    monkeypatch.setattr(hold, "MAP_PIXELS", 48 * 64)
    monkeypatch.setattr(hold, "SCORE_CHUNK", 2)  # more than one pass over the five images
    det = bundle.load(tiny_bundle)[0]
    rng = np.random.default_rng(3)
    root = tmp_path / "holdout"
    for i in range(5):
        folder = root / ("good" if i < 2 else "defective/scratch")
        folder.mkdir(parents=True, exist_ok=True)
        Image.fromarray(rng.integers(60, 190, (120, 160), dtype=np.uint8)).save(folder / f"{i}.png")
        if i >= 2:
            mask = np.zeros((120, 160), np.uint8)
            mask[40 + 10 * (i - 2), 30:130] = 255  # a 1 px scratch, 100 px long
            (root / "masks/scratch").mkdir(parents=True, exist_ok=True)
            Image.fromarray(mask).save(root / "masks/scratch" / f"{i}.png")
    h = hold.load_holdout(det, root / "good", root / "defective", root / "masks")
    want = det.inspect([read_image(p, min_side=1) for p in h.paths])
    # scored whole, as the service scores them (passes of 2 and of 5 images agree to float32 rounding)
    assert np.allclose(h.scores, [r.score for r in want], rtol=1e-5, atol=0)
    assert all(m.shape == (48, 64) for m in h.heatmaps)  # 120 x 160 = 6.25 x the limit: 2.5 x smaller each side
    assert [None if m is None else m.shape for m in h.masks] == [None, None] + [(48, 64)] * 3
    for m in h.masks[2:]:
        assert 30 <= m.sum() <= 2 * 40  # the 100 px scratch at 1 / 2.5 scale: about 40 px, not lost, not smeared
    full = want[0].heatmap
    assert np.allclose(h.heatmaps[0].mean(), full.mean(), rtol=0.05)  # the same map, reduced
    choice = threshold_for_false_reject(h.scores[:2], h.scores[2:], 0.5)
    page = write_report(tmp_path / "r", h, choice, title="t", model_info={})  # the gallery reduces the image
    assert list((tmp_path / "r" / "gallery").glob("*_heatmap.png"))
    assert h.maps_reduced == 5  # and the report says at which scale the pixel metrics were measured
    assert "5 images over 1 megapixel measured at about 1 megapixel" in page.read_text()


def test_a_mask_is_found_by_its_image_stem_or_that_stem_with_a_mask_suffix(tmp_path):
    """`find_mask`: masks/dent/3.png or masks/dent/3_mask.png (the name many labelling tools and public datasets
    write, e.g. the open MVTec AD layout, `ground_truth/<class>/000_mask.png`) belongs to defective/dent/3.jpg; the
    plain stem wins where both exist; a mask of another folder or another stem does not match; nothing is found
    without a masks folder. A label image (defect pixels 1, 8 or 16 bit) is a mask like a white-on-black one."""
    from knowngood.training.holdout import find_mask

    defective, masks = tmp_path / "defective", tmp_path / "masks"

    def save(path: Path, rows: slice) -> None:
        path.parent.mkdir(parents=True, exist_ok=True)
        m = np.zeros((16, 20), np.uint8)
        m[rows] = 255
        Image.fromarray(m).save(path)

    save(masks / "dent/3_mask.png", slice(0, 2))
    save(masks / "dent/4.png", slice(0, 2))
    save(masks / "dent/4_mask.png", slice(0, 6))
    save(masks / "dent/5-mask.bmp", slice(2, 3))
    save(masks / "dent/deeper/6.png", slice(0, 2))  # not dent/6's: another folder
    save(masks / "scratch/7_mask.png", slice(0, 2))  # not dent/7's
    save(masks / "dent/77_mask.png", slice(0, 2))  # not dent/7's: another stem
    found = {n: find_mask(defective / f"dent/{n}.jpg", defective, masks) for n in (3, 4, 5, 6, 7)}
    assert found[3].shape == (16, 20) and found[3].sum() == 40
    assert found[4].sum() == 40  # 4.png, not 4_mask.png (120 px)
    assert found[5].sum() == 20 and found[5].dtype == bool
    assert found[6] is None and found[7] is None
    assert find_mask(defective / "dent/3.jpg", defective, None) is None
    label = np.zeros((16, 20), np.uint8)
    label[3:5, :] = 1  # a label image: defect pixels 1, not 255
    Image.fromarray(label).save(masks / "dent/8.png")
    Image.fromarray(label.astype(np.uint16)).save(masks / "dent/9.png")  # 16 bit, 1 of 65535
    Image.fromarray(np.zeros((16, 20), np.uint8)).save(masks / "dent/10.png")
    assert find_mask(defective / "dent/8.png", defective, masks).sum() == 40
    assert find_mask(defective / "dent/9.png", defective, masks).sum() == 40
    assert find_mask(defective / "dent/10.png", defective, masks).sum() == 0


def test_a_good_folder_inside_the_defective_one_is_left_out_of_the_defective_images(tiny_bundle, tmp_path):
    """A holdout laid out as test/good/ beside test/<defect class>/ (with masks named <stem>_mask.png), given as
    --good test/good --defective test: the good images are good only, never a defect class "good"."""
    from knowngood.training.errors import BadDataset
    from knowngood.training.holdout import load_holdout

    det = bundle.load(tiny_bundle)[0]
    rng = np.random.default_rng(5)
    test = tmp_path / "test"
    for folder, n in (("good", 3), ("dent", 2), ("scratch", 2)):
        (test / folder).mkdir(parents=True)
        for i in range(n):
            Image.fromarray(rng.integers(50, 200, (32, 32), dtype=np.uint8)).save(test / folder / f"{i:03d}.png")
            if folder != "good":
                (tmp_path / "ground_truth" / folder).mkdir(parents=True, exist_ok=True)
                mask = np.zeros((32, 32), np.uint8)
                mask[4:9, 4:9] = 255
                Image.fromarray(mask).save(tmp_path / "ground_truth" / folder / f"{i:03d}_mask.png")
    h = load_holdout(det, test / "good", test, tmp_path / "ground_truth")
    assert list(h.labels) == [0, 0, 0, 1, 1, 1, 1]
    assert h.classes[3:] == ["dent", "dent", "scratch", "scratch"]
    assert [None if m is None else int(m.sum()) for m in h.masks] == [None, None, None, 25, 25, 25, 25]
    # with --good elsewhere, test/good would be a defect class named "good": refused, saying what to pass
    (tmp_path / "other").mkdir()
    Image.fromarray(rng.integers(50, 200, (32, 32), dtype=np.uint8)).save(tmp_path / "other" / "0.png")
    with pytest.raises(BadDataset, match=r"3 images in a defect class named good .*pass that folder as --good"):
        load_holdout(det, tmp_path / "other", test)
    for good, defective in ((test, test / "dent"), (test, test)):  # the other way round: refused before any reading
        with pytest.raises(BadDataset, match="is inside --good"):
            load_holdout(det, good, defective)


def test_masks_beside_or_inside_the_defective_folder_are_not_defective_images(tiny_bundle, tmp_path, monkeypatch):
    """Masks kept beside their images (dent/0.png and dent/0_mask.png, --masks the defective folder itself) or in
    a folder inside the defective one (defective/masks/dent/0.png) are masks only: before, each was read as one
    more defective image too (a class "masks", or a second image of dent), and an image could be its own mask."""
    from knowngood.training import holdout
    from knowngood.training.holdout import load_holdout

    det = bundle.load(tiny_bundle)[0]
    rng = np.random.default_rng(6)
    good = tmp_path / "good"
    good.mkdir()
    for i in range(3):
        Image.fromarray(rng.integers(50, 200, (32, 32), dtype=np.uint8)).save(good / f"{i}.png")
    mask = np.zeros((32, 32), np.uint8)
    mask[4:9, 4:9] = 255
    listed, list_images = [], holdout._images_in  # which folders are listed
    monkeypatch.setattr(holdout, "_images_in", lambda folder: listed.append(folder) or list_images(folder))
    for layout in ("beside", "inside"):
        defective = tmp_path / layout
        masks = defective if layout == "beside" else defective / "masks"
        for cls, n in (("dent", 2), ("scratch", 1)):
            (defective / cls).mkdir(parents=True)
            (masks / cls).mkdir(parents=True, exist_ok=True)
            for i in range(n):
                Image.fromarray(rng.integers(50, 200, (32, 32), dtype=np.uint8)).save(defective / cls / f"{i}.png")
                name = f"{i}_mask.png" if layout == "beside" else f"{i}.png"
                Image.fromarray(mask).save(masks / cls / name)
        listed.clear()
        h = load_holdout(det, good, defective, masks)
        # each masks folder listed once for all its images, not once per image (masks beside their images: the
        # same listing tells which files are masks and finds them)
        assert [listed.count(masks / cls) for cls in ("dent", "scratch")] == [1, 1], (layout, listed)
        assert list(h.labels) == [0, 0, 0, 1, 1, 1], layout
        assert h.classes[3:] == ["dent", "dent", "scratch"], layout
        assert [int(m.sum()) for m in h.masks[3:]] == [25, 25, 25], layout
    # the same files without --masks: a file named like a mask is then an image like any other
    assert len(load_holdout(det, good, tmp_path / "beside").labels) == 9
