"""`knowngood demo`: the whole job on the invented demo parts, start to finish, on CPU."""

from __future__ import annotations

import json
import time
from pathlib import Path

from knowngood.demo_parts import PART_KINDS, render_scenario
from knowngood.training.commands import tune_model
from knowngood.training.config import ModelConfig, TrainConfig
from knowngood.training.folders import load_folder
from knowngood.training.train import train_bundle

DEMO_STEPS = 900  # work per part kind; on 2 CPU cores the time cap ends it first (~420 steps), so figures vary a little
DEMO_MINUTES = 2.5  # cap per part kind (three kinds), so `make demo` stays inside 15 minutes with the install
DEMO_TARGET_FALSE_REJECT = 0.02


def run_demo(out: Path, *, steps: int | None = None, minutes: float | None = None, seed: int = 0) -> dict:
    out = Path(out)
    t0 = time.monotonic()
    print(f"rendering the demo parts into {out / 'data'} ...", flush=True)
    kinds = render_scenario(out / "data", seed=seed)
    results = {}
    for kind in PART_KINDS:
        root = kinds[kind]
        good = load_folder(root / "train" / "good")
        model_path = out / f"{kind}.kgm"
        print(f"\n[{kind}] training on {len(good.images)} known-good images ...", flush=True)
        tcfg = TrainConfig(steps=steps or DEMO_STEPS, minutes=DEMO_MINUTES if minutes is None else minutes, seed=seed)
        train_bundle(good, model_path, model=ModelConfig(channels=good.channels), train=tcfg)
        summary = tune_model(
            model_path,
            root / "holdout" / "good",
            root / "holdout" / "defective",
            root / "holdout" / "masks",
            output=model_path,  # the demo's own fresh bundle: tuned in place on purpose
            target_false_reject=DEMO_TARGET_FALSE_REJECT,
            report=out / "reports" / kind,
        )
        results[kind] = summary
        print(
            f"[{kind}] image AUROC {summary['image_auroc']:.3f}  pixel AUROC {_fmt(summary.get('pixel_auroc'))}  "
            f"report {summary['report']}",
            flush=True,
        )
    results["seconds"] = round(time.monotonic() - t0, 1)
    (out / "summary.json").write_text(json.dumps(results, indent=2, default=float))
    print(f"\ndone in {results['seconds']:.0f} s. Reports: " + ", ".join(results[k]["report"] for k in PART_KINDS))
    print(f"Models: {', '.join(str(out / f'{k}.kgm') for k in PART_KINDS)}; summary: {out / 'summary.json'}")
    return results


def _fmt(value: float | None) -> str:
    """A figure to 3 decimals, or "–" where there is none (a pixel AUROC without masks)."""
    return "–" if value is None else f"{value:.3f}"
