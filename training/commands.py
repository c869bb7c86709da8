"""What each CLI command does, with arguments already parsed. Heavy imports live here, not in cli.py."""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import os
import sys
from collections import Counter
from pathlib import Path

import numpy as np

from training import bundle, runtime
from training.config import ModelConfig, TrainConfig
from training.data import fingerprint, list_images, load_folder, read_image
from training.errors import BadConfig, BadDataset, BadImage
from training.heatmap import heatmap_png_bytes
from training.selection import term_summary
from training.train import train_bundle
from training.tuning import threshold_for_catch, threshold_for_false_reject


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
    _writable_output(args.output)
    good = load_folder(args.good_dir, skip_bad=args.skip_bad)
    for path, why in good.skipped:
        print(f"knowngood: skipped {path}: {why}", file=sys.stderr)
    steps = args.steps if args.steps is not None else 10**9
    minutes = args.minutes if args.minutes is not None else (None if args.steps is not None else 10.0)
    model = ModelConfig(size=args.size, tile=args.tile, channels=good.channels)
    shifts = TrainConfig.residual_shifts
    if args.residual_shift is not None:  # fixed by the user: the choice of terms keeps it
        model = dataclasses.replace(model, residual_shift=args.residual_shift)
        shifts = (args.residual_shift,)
    tcfg = TrainConfig(
        residual_shifts=shifts,
        steps=steps,
        minutes=minutes or 0.0,
        seed=args.seed,
        recipe=args.recipe,
        target_false_reject=args.target_false_reject,
    )
    det = train_bundle(good, args.output, model=model, train=tcfg, progress=not args.quiet, resume=not args.fresh)
    t = det.manifest["training"]
    print(
        f"wrote {args.output} (model {det.model_id}, {t['steps_done']} steps in {t['seconds']:.0f} s, "
        f"threshold {det.threshold:.3f} by {det.manifest['threshold']['method']})"
    )
    if det.manifest["threshold"].get("method") == "conformal-max":
        print(f"note: {det.manifest['threshold']['note'].split(';')[0]}")
    choice = det.manifest["score"].get("choice", {})
    if "chosen" in choice:
        print(f"chose {term_summary(choice)}")
    return 0


def tune(args) -> int:
    _rate("--target-false-reject", args.target_false_reject)
    _rate("--target-catch", args.target_catch)
    summary = tune_model(
        args.model,
        args.good,
        args.defective,
        args.masks,
        target_catch=args.target_catch,
        target_false_reject=args.target_false_reject,
        report=args.report,
        output=args.output,
        skip_bad=args.skip_bad,
    )
    print(json.dumps(summary, indent=2, default=float))
    return 0


def tune_model(
    model: Path,
    good: Path,
    defective: Path,
    masks: Path | None,
    *,
    target_catch: float | None = None,
    target_false_reject: float | None = None,
    report: Path | None = None,
    output: Path | None = None,
    skip_bad: bool = False,
) -> dict:
    """Scores the labelled holdout, sets the threshold (default: 1 % false-reject), saves, writes the report."""
    from training.holdout import load_holdout  # matplotlib comes with the report: keep `inspect` light
    from training.report import metrics_summary, write_report

    det, frechet = bundle.load(model)
    holdout = load_holdout(det, good, defective, masks, skip_bad=skip_bad)
    good_s, bad_s = holdout.scores[holdout.labels == 0], holdout.scores[holdout.labels == 1]
    if len(good_s) == 0 or len(bad_s) == 0:
        raise BadDataset("the holdout needs at least one good and one defective image")
    if target_catch is not None:
        choice = threshold_for_catch(good_s, bad_s, target_catch)
    else:
        choice = threshold_for_false_reject(good_s, bad_s, 0.01 if target_false_reject is None else target_false_reject)
    now = dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")
    manifest = dict(det.manifest)
    manifest["threshold"] = {**choice.to_dict(), "set_by": "tune", "set_at": now}
    manifest["fingerprints"] = {**manifest.get("fingerprints", {}), "holdout": fingerprint(holdout.paths)}
    tuned = dataclasses.replace(det, threshold=float(choice.value), manifest=manifest)
    out = output or model
    bundle.save(tuned, frechet, out)
    summary = metrics_summary(holdout, choice)
    if report is not None:
        page = write_report(
            report,
            holdout,
            choice,
            title=f"knowngood report: {Path(model).name}",
            model_info=_model_info(tuned, out),
        )
        summary["report"] = str(page)
    summary["bundle"] = str(out)
    return summary


def _model_info(det, out: Path) -> dict:
    """The report's model table: identity, and which terms were chosen and why (from the bundle)."""
    info = {"model_id": det.model_id, "bundle": str(out)}
    choice = det.manifest.get("score", {}).get("choice", {})
    info["terms"] = term_summary(choice) if "chosen" in choice else choice.get("method", "not recorded")
    if det.cfg.tile:
        info["tiles"] = f"{det.cfg.tile} px at the camera's scale, each at {det.cfg.size} px"
    return info


def _expand(paths: list[Path]) -> list[Path]:
    files: list[Path] = []
    for p in paths:
        if p.is_dir():
            files.extend(list_images(p))
        elif p.is_file():
            files.append(p)
        else:
            raise BadDataset(f"{p}: no such file or folder")
    if not files:
        raise BadDataset(f"no images found in {', '.join(map(str, paths))}")
    return files


def heatmap_names(files: list[Path]) -> dict[Path, str]:
    """One file name (no suffix) per input image for `inspect --heatmaps`: the image's stem, or, where several
    images share a stem (the same numbering in two folders), its path below their common folder with `_` for
    `/` (pit/0001.png -> pit_0001); a `-2`, `-3` suffix settles anything still equal. A file given twice keeps
    one name."""
    unique = list(dict.fromkeys(p.resolve() for p in files))
    count = Counter(p.stem for p in unique)
    shared = [p.parent for p in unique if count[p.stem] > 1]
    root = Path(os.path.commonpath(shared)) if shared else None
    named: dict[Path, str] = {}
    used: set[str] = set()
    for p in unique:
        base = p.stem if count[p.stem] == 1 else "_".join(p.with_suffix("").relative_to(root).parts)
        name, k = base, 2
        while name in used:
            name, k = f"{base}-{k}", k + 1
        named[p] = name
        used.add(name)
    return {p: named[p.resolve()] for p in files}


def inspect(args) -> int:
    _positive("--batch", args.batch)
    if args.heatmaps is not None and args.heatmaps.exists() and not args.heatmaps.is_dir():
        raise BadConfig(f"--heatmaps {args.heatmaps}: is a file; give a folder")
    det, _ = bundle.load(args.model)
    if runtime.available():
        det.use_onnx()  # the same graph and weights as eager PyTorch, about 3x faster on a CPU (tests pin equality)
    files = _expand(args.paths)
    names = {}
    if args.heatmaps is not None:
        args.heatmaps.mkdir(parents=True, exist_ok=True)
        names = heatmap_names(files)
    flagged = 0
    for start in range(0, len(files), max(1, args.batch)):
        chunk, images = [], []
        for path in files[start : start + args.batch]:
            try:
                images.append(read_image(path))
                chunk.append(path)
            except BadImage as exc:
                if not args.skip_bad:
                    raise
                print(f"knowngood: skipped {path}: {exc}", file=sys.stderr)
        for path, img, res in zip(chunk, images, det.inspect(images)):
            flagged += res.verdict == "flag"
            _emit(args, path, img, res, names.get(path), det.model_id)
    return 1 if args.fail_on_flag and flagged else 0


def _emit(args, path: Path, img: np.ndarray, res, name: str | None, model_id: str) -> None:
    row = {
        "image": str(path),
        "score": round(res.score, 6),
        "threshold": round(res.threshold, 6),
        "verdict": res.verdict,
        "model_id": model_id,
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
