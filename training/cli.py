"""The `knowngood` command: train, tune, inspect, demo, export-reviews (and `serve`, registered by the service package).

Exit codes: 0 done; 1 flagged parts found (inspect --fail-on-flag only); 2 bad usage or bad input.
"""

from __future__ import annotations

import argparse
import os
import sys
from importlib.metadata import entry_points
from pathlib import Path

from knowngood.training.config import AUTO_SIZE_MAX, SCALE_NOTE_RATIO, ModelConfig, TrainConfig
from knowngood.training.errors import KnowngoodError
from knowngood.training.export_reviews import register as _add_export_reviews


def _add_train(sub) -> None:
    p = sub.add_parser("train", help="train on a folder of known-good images")
    p.add_argument("good_dir", type=Path, metavar="GOOD_DIR")
    p.add_argument("-o", "--output", type=Path, required=True, metavar="MODEL", help="bundle file to write")
    p.add_argument(
        "--minutes",
        type=float,
        default=None,
        help="wall-time cap of the networks' fitting (default 10 without --steps); the feature critic, the memory "
        "and the choice of terms follow it (measured: 0.5 to 3 minutes more for a few hundred images at 128 px, 6 "
        "for a tiled model or 1000 images at 256 px)",
    )
    p.add_argument("--steps", type=int, default=None, help="fix the work: same seed, data, steps = same bundle")
    p.add_argument(
        "--patience",
        type=int,
        default=TrainConfig.patience,
        metavar="STEPS",
        help="stop fitting early once the held-out reconstruction error (which picks the kept checkpoint) has not "
        f"fallen for this many steps, and for as many as its best took (default {TrainConfig.patience}; 0: use the "
        "whole --minutes or --steps)",
    )
    p.add_argument(
        "--size",
        type=int,
        default=None,
        metavar="PX",
        help=f"working resolution: the long side in px, a multiple of 16 up to 1024 (default {ModelConfig.size}; "
        f"for images over {SCALE_NOTE_RATIO:g}x that, their median long side / {SCALE_NOTE_RATIO:g}, up to "
        f"{AUTO_SIZE_MAX}; with --from, the bundle's); the short side follows the images' aspect ratio",
    )
    p.add_argument(
        "--tile",
        type=int,
        default=None,
        metavar="PX",
        help="inspect large images in tiles of PX native px (resized to --size), at the camera's own scale, "
        "instead of shrinking the whole image; the heatmap is stitched back at full resolution (with --from, "
        "the bundle's)",
    )
    p.add_argument(
        "--from",
        dest="start",
        type=Path,
        default=None,
        metavar="MODEL",
        help="continue from this bundle's trained networks on the new images (e.g. confirmed reviews) instead of "
        "a fresh start; its settings are kept (a different --size or --tile is refused), and everything fitted "
        "to data (standardisation, terms, threshold) is fitted afresh",
    )
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--recipe", choices=("joint", "two_stage"), default="joint")
    p.add_argument(
        "--residual-shift",
        type=int,
        choices=range(4),
        default=None,
        metavar="PX",
        help="fix the px of fixture jitter the image residual forgives (default: chosen at train time, 0 or 1)",
    )
    p.add_argument("--target-false-reject", type=float, default=0.01, help="conformal threshold target")
    p.add_argument("--skip-bad", action="store_true", help="skip unreadable images and report them")
    p.add_argument("--fresh", action="store_true", help="ignore a checkpoint left by an interrupted run")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_train)


def _add_tune(sub) -> None:
    p = sub.add_parser("tune", help="set the threshold from a labelled holdout and write the report")
    p.add_argument("model", type=Path, metavar="MODEL")
    p.add_argument("--good", type=Path, required=True, metavar="DIR")
    p.add_argument(
        "--defective",
        type=Path,
        required=True,
        metavar="DIR",
        help="defective images; a subfolder's name is the defect class; a --good folder inside DIR is left out",
    )
    p.add_argument(
        "--masks",
        type=Path,
        default=None,
        metavar="DIR",
        help="defect masks (white = defect) for the pixel metrics: defective/dent/3.png's mask is DIR/dent/3.png, or "
        "3_mask.png, 3-mask.png or 3_gt.png (any image suffix); DIR may be the defective folder itself (masks beside "
        "their images, named with a suffix) or a folder inside it",
    )
    target = p.add_mutually_exclusive_group()
    target.add_argument("--target-false-reject", type=float, default=None, metavar="A")
    target.add_argument("--target-catch", type=float, default=None, metavar="C")
    p.add_argument("--report", type=Path, default=None, metavar="DIR")
    p.add_argument(
        "--compare",
        type=Path,
        default=None,
        metavar="OLD_MODEL",
        help="also score the holdout with OLD_MODEL (e.g. the model in service before a retraining) and show the "
        "two side by side: AUROCs, the rates at each model's own threshold, one ROC plot with both curves",
    )
    out = p.add_mutually_exclusive_group()
    out.add_argument("-o", "--output", type=Path, default=None, metavar="OUT", help="write the tuned bundle here")
    out.add_argument("--in-place", action="store_true", help="rewrite MODEL with the tuned threshold")
    p.add_argument("--json", action="store_true", help="print the whole summary as JSON instead of a few lines")
    p.add_argument("--skip-bad", action="store_true", help="skip unreadable images and report them")
    p.set_defaults(func=cmd_tune)


def _add_inspect(sub) -> None:
    p = sub.add_parser("inspect", help="score images or folders")
    p.add_argument("model", type=Path, metavar="MODEL")
    p.add_argument("paths", type=Path, nargs="+", metavar="PATH")
    p.add_argument(
        "--json",
        action="store_true",
        help="one JSON object a line: image, score, threshold, verdict, model_id, revision, time "
        "(+ heatmap with --heatmaps)",
    )
    p.add_argument(
        "--heatmaps",
        type=Path,
        default=None,
        metavar="DIR",
        help="write <stem>.png (overlay) and <stem>.npy (float32 map); stems shared by inputs get their folder",
    )
    p.add_argument("--fail-on-flag", action="store_true", help="exit 1 when any part is flagged")
    p.add_argument("--skip-bad", action="store_true", help="report unreadable images instead of stopping")
    p.add_argument("--batch", type=int, default=32)
    p.set_defaults(func=cmd_inspect)


def _add_demo(sub) -> None:
    p = sub.add_parser("demo", help="render the demo parts, train, tune, inspect and write the reports")
    p.add_argument("--out", type=Path, default=Path("demo_out"))
    p.add_argument("--steps", type=int, default=None, help="training steps per part kind")
    p.add_argument("--minutes", type=float, default=None, help="training time cap per part kind")
    p.add_argument("--seed", type=int, default=0)
    p.set_defaults(func=cmd_demo)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="knowngood", description="Visual inspection from known-good images.")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for add in (_add_train, _add_tune, _add_inspect, _add_demo, _add_export_reviews):
        add(sub)
    for ep in entry_points(group="knowngood.commands"):
        try:
            ep.load()(sub)
        except ImportError:  # the service's extras are not installed: its commands are simply absent
            continue
    return parser


def cmd_train(args) -> int:
    from knowngood.training.commands import train

    return train(args)


def cmd_tune(args) -> int:
    from knowngood.training.commands import tune

    return tune(args)


def cmd_inspect(args) -> int:
    from knowngood.training.commands import inspect

    return inspect(args)


def cmd_demo(args) -> int:
    from knowngood.training.demo import run_demo

    run_demo(args.out, steps=args.steps, minutes=args.minutes, seed=args.seed)
    return 0


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except KnowngoodError as exc:
        print(f"knowngood: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except (FileNotFoundError, IsADirectoryError, PermissionError) as exc:
        print(f"knowngood: error: {exc.filename}: {exc.strerror}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # `inspect --json | head`: the reader left; nothing more to say (Python docs, signal)
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except KeyboardInterrupt:
        print("knowngood: interrupted (a training checkpoint, if any, lets the run resume)", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
