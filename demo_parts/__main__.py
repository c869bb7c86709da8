"""python -m demo_parts --out DIR [--seed S] [--size PX]: renders the scenario and prints its folders."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from knowngood.demo_parts.scenario import render_scenario


def main(argv: list[str] | None = None) -> int:
    summary = __doc__.split(":", 1)[1].strip()
    parser = argparse.ArgumentParser(prog="python -m demo_parts", description=summary)
    parser.add_argument("--out", type=Path, required=True, help="folder to write into (created if missing)")
    parser.add_argument("--seed", type=int, default=0, help="non-negative; same seed, same bytes")
    parser.add_argument("--size", type=int, default=128, help="image side in pixels (at least 32)")
    parser.add_argument("--n-train", type=int, default=240)
    parser.add_argument("--n-holdout-good", type=int, default=60)
    parser.add_argument("--n-defective", type=int, default=12, help="holdout images per defect kind")
    args = parser.parse_args(argv)
    try:
        roots = render_scenario(
            args.out,
            seed=args.seed,
            size=args.size,
            n_train=args.n_train,
            n_holdout_good=args.n_holdout_good,
            n_holdout_defective_per_kind=args.n_defective,
        )
    except ValueError as exc:
        parser.error(str(exc))
    for kind, root in roots.items():
        print(f"{kind}\t{root}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
