"""What the checks with drawn defects share (`texture_check.py`, `lineart_check.py`): image AUROC per defect kind,
and the command line that measures each named set in turn and writes the JSON after each."""

from __future__ import annotations

import argparse
import json
from collections.abc import Callable
from pathlib import Path

import numpy as np
import torch
from sklearn.metrics import roc_auc_score


def per_kind(labels: np.ndarray, n_good: int, kinds: tuple[str, ...], **scores) -> dict[str, float]:
    """{"<method>_<kind>": image AUROC of the good images against that kind's defective ones}: the test set is
    `n_good` good images, then the defective ones with kinds in turn (kinds[i % len(kinds)])."""
    n_bad = len(labels) - n_good
    out = {}
    for k, kind in enumerate(kinds):
        idx = np.r_[np.arange(n_good), n_good + np.arange(k, n_bad, len(kinds))]
        for method, s in scores.items():
            out[f"{method}_{kind}"] = round(float(roc_auc_score(labels[idx], np.asarray(s)[idx])), 3)
    return out


def main(
    argv: list[str] | None,
    *,
    description: str,
    names: tuple[str, ...],
    what: str,
    measure: Callable[[str, float, Path], dict],
    default_out: Path,
    extra: Callable[[argparse.ArgumentParser], None] | None = None,
    before: Callable[[argparse.Namespace], int | None] | None = None,
) -> int:
    """Parses NAME ... [--minutes M] [--out FILE] (plus `extra`'s options), then `measure(name, minutes, out dir)`
    for each name (default: all), printing each result and writing them all to --out after each. `before` may
    act on the options first and return an exit code to stop there."""
    ap = argparse.ArgumentParser(description=description)
    ap.add_argument("names", nargs="*", help=f"any of {', '.join(names)} (default: all)")
    ap.add_argument("--minutes", type=float, default=2.5)
    ap.add_argument("--out", type=Path, default=default_out)
    if extra:
        extra(ap)
    args = ap.parse_args(argv)
    unknown = sorted(set(args.names) - set(names))
    if unknown:
        ap.error(f"unknown {what}(s) {', '.join(unknown)}; choose from {', '.join(names)}")
    if before and (code := before(args)) is not None:
        return code
    torch.set_num_threads(2)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    result = {}
    for name in args.names or names:
        result[name] = measure(name, args.minutes, args.out.parent)
        print(name, json.dumps(result[name]), flush=True)
        args.out.write_text(json.dumps(result, indent=2))
    return 0
