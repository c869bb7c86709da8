"""The command line shared by the lever scripts (`memory_levers.py`, `combination_levers.py`): dataset names in,
one JSON object per dataset printed as it is measured, all of them written to --out."""

from __future__ import annotations

import argparse
import json
from collections.abc import Callable
from pathlib import Path

import torch

from tests.bench import datasets


def lever_main(
    argv: list[str] | None,
    *,
    description: str,
    out: str,
    threads: int,
    measure: Callable[[str, argparse.Namespace], dict],
    extra: Callable[[argparse.ArgumentParser], None] | None = None,
) -> int:
    """Parses NAME ... [--out] [--cache] (+ `extra`'s options), runs `measure(name, args)` on `threads` threads for
    each 128 px dataset, prints and writes the results."""
    ap = argparse.ArgumentParser(description=description)
    ap.add_argument("names", nargs="+", choices=datasets.NAMES[:-2])  # 128 px sets (not the 640 px or tiled ones)
    ap.add_argument("--out", type=Path, default=Path(out))
    ap.add_argument("--cache", type=Path, default=Path("bench_out/cache"))
    if extra is not None:
        extra(ap)
    args = ap.parse_args(argv)
    torch.set_num_threads(threads)
    result = {}
    for name in args.names:
        result[name] = measure(name, args)
        print(name, json.dumps(result[name]), flush=True)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(result, indent=2))
    return 0
