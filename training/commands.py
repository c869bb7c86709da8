"""What each CLI command does, with arguments already parsed. Heavy imports live here, not in cli.py."""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import os
import sys
from pathlib import Path

import numpy as np
from knowngood.training import bundle, runtime
from knowngood.training.config import ModelConfig, TrainConfig
from knowngood.training.data import min_side_for, read_image, read_shape, working_shape
from knowngood.training.detector import Detector
from knowngood.training.errors import BadBundle, BadConfig, BadImage
from knowngood.training.folders import ImageSet, expand_paths, fingerprint, list_images, load_folder, skip_reason
from knowngood.training.heatmap import heatmap_names, heatmap_png_bytes
from knowngood.training.selection import term_summary
from knowngood.training.train import auto_size, continued_config, median_side, scale_note, train_bundle
from knowngood.training.tuning import threshold_for_catch, threshold_for_false_reject


def _rate(name: str, value: float | None) -> None:
    if value is not None and not 0 < value < 1:
        raise BadConfig(f"{name} must be between 0 and 1 (exclusive), got {value}")


def _positive(name: str, value: float | None) -> None:
    if value is not None and not value > 0:
        raise BadConfig(f"{name} must be positive, got {value:g}")


def _writable_output(path: Path) -> None:
    """Checked before minutes of work: the bundle's folder exists and takes files."""
    folder = Path(path).parent
    if not folder.is_dir():
        raise BadConfig(f"-o {path}: folder {folder} does not exist")
    if not os.access(folder, os.W_OK):
        raise BadConfig(f"-o {path}: folder {folder} is not writable")
    if Path(path).is_dir():
        raise BadConfig(f"-o {path}: is a folder; give a file name such as part.kgm")


def train(args) -> int:
    _rate("--target-false-reject", args.target_false_reject)
    _positive("--minutes", args.minutes)
    _positive("--steps", args.steps)
    if args.patience < 0:
        raise BadConfig(f"--patience must be 0 (off) or a number of steps, got {args.patience}")
    _writable_output(args.output)
    start = _load_named("--from", args.start)
    if start is not None:  # the bundle's settings, which its weights fit, colour mode included
        model = continued_config(start, size=args.size, tile=args.tile, name=str(args.start))
    else:
        model = ModelConfig(size=ModelConfig.size if args.size is None else args.size, tile=args.tile or 0)
    good, model = _known_good(args, model, start)
    _report_skipped(good.skipped)
    steps = args.steps if args.steps is not None else 10**9
    minutes = args.minutes if args.minutes is not None else (None if args.steps is not None else 10.0)
    if start is None:
        model = dataclasses.replace(model, channels=good.channels)
    note = scale_note(good.shapes, model)
    if note:
        print(f"knowngood: note: {note}", file=sys.stderr)
    shifts = TrainConfig.residual_shifts
    if args.residual_shift is not None:  # fixed by the user: the choice of terms keeps it
        model = dataclasses.replace(model, residual_shift=args.residual_shift)
        shifts = (args.residual_shift,)
    tcfg = TrainConfig(
        patience=args.patience,
        residual_shifts=shifts,
        steps=steps,
        minutes=minutes or 0.0,
        seed=args.seed,
        recipe=args.recipe,
        target_false_reject=args.target_false_reject,
    )
    det = train_bundle(
        good,
        args.output,
        model=model,
        train=tcfg,
        progress=not args.quiet,
        resume=not args.fresh,
        start=start,
        start_path=args.start,
    )
    t = det.manifest["training"]
    print(
        f"wrote {args.output} (model {det.model_id}, {t['steps_done']} steps in {t['seconds']:.0f} s, "
        f"threshold {det.threshold:.3f} by {det.manifest['threshold']['method']})"
    )
    if t.get("stopped_early"):
        print(
            f"stopped early: the held-out reconstruction error had not fallen since step {t['chosen_step']} "
            f"(--patience {tcfg.patience}; 0 uses the whole budget)"
        )
    if det.manifest["threshold"].get("method") == "conformal-max":
        print(f"note: {det.manifest['threshold']['note'].split(';')[0]}")
    choice = det.manifest["score"].get("choice", {})
    if "chosen" in choice:
        print(f"chose {term_summary(choice)}")
    if start is not None:
        print(f"continued from {args.start} (model {start.model_id}, sha256 {start.sha256})")
    return 0


def _known_good(args, model: ModelConfig, start: Detector | None) -> tuple[ImageSet, ModelConfig]:
    """`train`'s known-good images and the working size they give. The sizes come from the files' headers first
    (`auto_size` without --size, --tile or --from; the aspect ratio for `working_shape`), so each image is reduced
    to the working shape as soon as it is decoded and training never holds the set at full resolution (a tiled
    model's tiles are cut at the camera's scale: its images stay in their files and are decoded one at a time)."""
    limits = dict(min_side=min_side_for(max(model.shape)))
    shape = None if model.tile else model.shape  # a continued model's (its bundle's)
    if start is None and not model.tile:
        shapes = [hw for hw in (read_shape(p, **limits) for p in list_images(args.good_dir)) if hw is not None]
        if args.size is None:  # large images: a working size nearer their own
            size = auto_size(shapes)
            if size != model.size:
                model = dataclasses.replace(model, size=size)
                print(
                    f"knowngood: working size {size} px for images of about {median_side(shapes)} px on the "
                    "long side (--size sets it)",
                    file=sys.stderr,
                )
        shape = working_shape(shapes, model.size)
    good = load_folder(args.good_dir, skip_bad=args.skip_bad, shape=shape, in_files=bool(model.tile), **limits)
    return good, model


def _load_named(option: str, path: Path | None) -> Detector | None:
    """The Detector of the bundle an option names (None without one); an unreadable bundle is refused, naming
    the option."""
    if path is None:
        return None
    try:
        return bundle.load(path)[0]
    except BadBundle as exc:
        raise BadBundle(f"{option} {exc}") from None


def _report_skipped(skipped: list[tuple[Path, str]]) -> None:
    """One stderr line per image `--skip-bad` left out, naming it once."""
    for path, why in skipped:
        print(f"knowngood: skipped {path}: {why}", file=sys.stderr)


def tune(args) -> int:
    _rate("--target-false-reject", args.target_false_reject)
    _rate("--target-catch", args.target_catch)
    if args.output is None and not args.in_place:  # the model file is the user's record: never rewritten unasked
        raise BadConfig(
            f"tune: give -o OUT to write the tuned bundle to a new file, or --in-place to rewrite {args.model}"
        )
    output = args.model if args.in_place else args.output
    _writable_output(output)
    summary = tune_model(
        args.model,
        args.good,
        args.defective,
        args.masks,
        target_catch=args.target_catch,
        target_false_reject=args.target_false_reject,
        report=args.report,
        output=output,
        skip_bad=args.skip_bad,
        compare=args.compare,
    )
    for warning in summary["warnings"]:
        print(f"knowngood: warning: {warning}", file=sys.stderr)
    if args.json:
        print(json.dumps(summary, indent=2, default=float))
    else:
        print(tune_text(summary))
    return 0


def tune_text(summary: dict) -> str:
    """The few lines a person reads after `tune`: the threshold and its target, the rates it achieves with their
    intervals, the AUROCs, and where the bundle and the report are."""
    from knowngood.training.comparison import compare_text
    from knowngood.training.report import mask_coverage, rate_text

    th = summary["threshold"]
    goal = (
        f"a catch rate of at least {100 * th['target']:g} %"
        if th["method"] == "catch"
        else f"a false-reject rate of at most {100 * th['target']:g} %"
    )
    quality = f"image AUROC {_num(summary['image_auroc'])}, average precision {_num(summary['average_precision'])}"
    if summary["masks"] is not None:
        quality += (
            f"; pixel AUROC {_num(summary['pixel_auroc'])}, PRO {_num(summary['pro'])} ({mask_coverage(summary)})"
        )
    report = f"report {summary['report']}" if "report" in summary else "no report (--report DIR writes one)"
    versus = compare_text(summary["compare"]) if "compare" in summary else []
    return "\n".join(
        [
            f"threshold {th['value']:.4g} for {goal}: a part is flagged when its score is above it",
            f"  false-reject rate  {rate_text(summary['false_reject'])}",
            f"  catch rate         {rate_text(summary['catch'])}",
            f"  {quality}",
            *versus,
            f"wrote {summary['bundle']} (model {summary['model_id']}, revision {summary['revision']}); {report}",
        ]
    )


def _num(x: float | None) -> str:
    return "n/a" if x is None else f"{x:.3f}"


def tune_model(
    model: Path,
    good: Path,
    defective: Path,
    masks: Path | None,
    *,
    output: Path,
    target_catch: float | None = None,
    target_false_reject: float | None = None,
    report: Path | None = None,
    skip_bad: bool = False,
    compare: Path | None = None,
) -> dict:
    """Scores the labelled holdout, sets the threshold (default: 1 % false-reject), saves the tuned bundle to
    `output` (which may be `model` itself), writes the report; returns the summary (`report.metrics_summary` plus
    where things went and the tuned bundle's identity). With `compare` (an older bundle), the holdout is scored
    with it too and `summary["compare"]` holds both models side by side, each at its own threshold."""
    from knowngood.training.comparison import compare_models
    from knowngood.training.holdout import load_holdout  # matplotlib comes with the report: keep `inspect` light
    from knowngood.training.report import metrics_summary, write_report

    det, frechet = bundle.load(model)
    old = _load_named("--compare", compare)  # before any work or writing
    holdout = load_holdout(det, good, defective, masks, skip_bad=skip_bad)
    _report_skipped(holdout.skipped)
    good_s, bad_s = holdout.scores[holdout.labels == 0], holdout.scores[holdout.labels == 1]
    if target_catch is not None:
        choice = threshold_for_catch(good_s, bad_s, target_catch)
    else:
        choice = threshold_for_false_reject(good_s, bad_s, 0.01 if target_false_reject is None else target_false_reject)
    now = dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")
    manifest = dict(det.manifest)
    manifest["threshold"] = {**choice.to_dict(), "set_by": "tune", "set_at": now}
    manifest["fingerprints"] = {**manifest.get("fingerprints", {}), "holdout": fingerprint(holdout.paths)}
    folders = {"good": str(good), "defective": str(defective), "masks": None if masks is None else str(masks)}
    manifest["folders"] = {**manifest.get("folders", {}), "holdout": folders}
    bundle.save(dataclasses.replace(det, threshold=float(choice.value), manifest=manifest), frechet, output)
    tuned, _ = bundle.load(output)  # what was written: its sha256, model id and revision
    summary = metrics_summary(holdout, choice)
    summary.update(model_id=tuned.model_id, revision=tuned.revision, sha256=tuned.sha256)
    versus = None if old is None else compare_models(holdout, summary, tuned, output, old, compare)
    if versus is not None:
        summary["compare"] = versus.to_dict()
    if report is not None:
        page = write_report(
            report,
            holdout,
            choice,
            title=f"knowngood report: {Path(model).name}",
            model_info=_model_info(tuned, output),
            comparison=versus,
        )
        summary["report"] = str(page)
    summary["bundle"] = str(output)
    return summary


def _model_info(det, out: Path) -> dict:
    """The report's Model table (label: value): the tuned bundle's identity, what it was trained on and for how
    long, which holdout tuned it, and which terms were chosen and why (all from the bundle)."""
    m = det.manifest
    folders, prints, training = m.get("folders", {}), m.get("fingerprints", {}), m.get("training", {})
    holdout = folders.get("holdout") or {}
    info = {
        "Model id": det.model_id,
        "Revision": det.revision,
        "Bundle": str(out),
        "Bundle sha256": det.sha256,
        "Training images": _folder_text(folders.get("training"), prints.get("training")),
        "Training": (
            f"{training['steps_done']} steps in {training['seconds']:.0f} s"
            if "steps_done" in training and "seconds" in training
            else "not recorded"
        ),
        "Holdout images": _folder_text(
            f"good {holdout['good']}, defective {holdout['defective']}" if holdout else None, prints.get("holdout")
        ),
    }
    if holdout.get("masks"):
        info["Holdout masks"] = holdout["masks"]
    start = training.get("continued_from")
    if start:
        info["Continued from"] = f"{start['bundle']} (model {start['model_id']}, sha256 {start['sha256']})"
    choice = m.get("score", {}).get("choice", {})
    info["Terms"] = term_summary(choice) if "chosen" in choice else choice.get("method", "not recorded")
    if det.cfg.tile:
        info["Tiles"] = f"{det.cfg.tile} px at the camera's scale, each at {det.cfg.size} px"
    return info


def _folder_text(folder: str | None, sha: str | None) -> str:
    where = folder or "folder not recorded"
    return f"{where} (fingerprint {sha})" if sha else where


def inspect(args) -> int:
    _positive("--batch", args.batch)
    if args.heatmaps is not None and args.heatmaps.exists() and not args.heatmaps.is_dir():
        raise BadConfig(f"--heatmaps {args.heatmaps}: is a file; give a folder")
    det, _ = bundle.load(args.model)
    if runtime.available():
        det.use_onnx()  # the same graph and weights as eager PyTorch, about 3x faster on a CPU (tests pin equality)
    files = expand_paths(args.paths)
    min_side = min_side_for(det.cfg.size)  # the service's limit for this model, too
    names = {}
    if args.heatmaps is not None:
        args.heatmaps.mkdir(parents=True, exist_ok=True)
        names = heatmap_names(files)
    flagged = 0
    for start in range(0, len(files), max(1, args.batch)):
        chunk, images = [], []
        for path in files[start : start + args.batch]:
            try:
                images.append(read_image(path, min_side=min_side))
                chunk.append(path)
            except BadImage as exc:
                if not args.skip_bad:
                    raise
                _report_skipped([(path, skip_reason(path, exc))])
        for path, img, res in zip(chunk, images, det.inspect(images)):
            flagged += res.verdict == "flag"
            _emit(args, path, img, res, names.get(path), det)
    return 1 if args.fail_on_flag and flagged else 0


def _emit(args, path: Path, img: np.ndarray, res, name: str | None, det) -> None:
    row = {
        "image": str(path),
        "score": round(res.score, 6),
        "threshold": round(res.threshold, 6),
        "verdict": res.verdict,
        "model_id": det.model_id,
        "revision": det.revision,
        "time": dt.datetime.now(dt.timezone.utc).isoformat(timespec="milliseconds"),
    }
    if name is not None:
        overlay = args.heatmaps / f"{name}.png"
        vmax = max(2 * res.threshold, 1e-6) if np.isfinite(res.threshold) else float(res.heatmap.max() or 1)
        overlay.write_bytes(heatmap_png_bytes(img, res.heatmap, vmax))
        np.save(args.heatmaps / f"{name}.npy", res.heatmap.astype(np.float32))
        row["heatmap"] = str(overlay)
    if args.json:
        print(json.dumps(row))
    else:
        print(f"{res.verdict:4}  {res.score:8.3f}  (threshold {res.threshold:.3f})  {path}")
