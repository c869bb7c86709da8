"""A lever on how the terms combine, measured on bundles `make bench` trained: the heatmap is now the maximum of
the standardised term maps (each pixel takes its strongest evidence), so a second term can only add where it is
the strongest; the mean of the same maps lets terms that each see part of a defect add up, and lets one term's
noise be damped by the others.

    python -m tests.bench.combination_levers [--bundles bench_out/bundles] [--out ...] NAME ...

Per dataset: the bench's knowngood bundle of that set (`<bundles>/<NAME>.kgm`), every term computed on its trained
nets as the ablation computes them (`ablation.all_terms_graph`), and the image AUROC (scikit-learn) of each set of
terms under both rules, image score = mean of the top 0.3 % of the heatmap as in the model. These are the
benchmark's own test splits: the figures are design evidence for the README's table of levers, not independent
test figures, and a rule adopted from them must be chosen per model on synthetic defects (`selection.py`).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import torch
from knowngood.training import bundle
from knowngood.training.config import COMBINE_RULES
from knowngood.training.detector import Detector
from knowngood.training.scoring import TERMS, ScoringGraph
from sklearn.metrics import roc_auc_score

from tests.bench import ablation, datasets
from tests.bench.levers import lever_main

SETS = (
    ("memory",),
    ("memory", "adversarial"),
    ("memory", "perceptual"),
    ("memory", "critic"),
    ("memory", "pixel"),
    ("memory", "adversarial", "perceptual"),
    ("memory", "adversarial", "critic", "pixel"),
    TERMS,
)


@torch.no_grad()
def term_maps(det: Detector, ds: datasets.Dataset) -> tuple[ScoringGraph, torch.Tensor]:
    """A graph computing every term on the bundle's nets (`ablation.all_terms_graph`) and its raw term maps
    (N, T, H, W) of the test images."""
    graph = ablation.all_terms_graph(det, ds.train)
    det_all = Detector(cfg=graph.cfg, graph=graph, threshold=float("inf"))
    x = det_all.prepare(ds.test)
    return graph, torch.cat([graph.term_maps(x[i : i + 16]) for i in range(0, len(x), 16)])


@torch.no_grad()
def image_scores(graph: ScoringGraph, maps: torch.Tensor, terms: tuple[str, ...], rule: str) -> torch.Tensor:
    """Image scores of `terms` at weight 1 under `rule`, through the graph's own `heat_from` (the model's rule,
    not a restatement of it); the graph's rule and weights are restored afterwards."""
    cfg, weights = graph.cfg, graph.weights.clone()
    graph.cfg = dataclasses.replace(cfg, combine=rule)
    graph.weights.copy_(ablation.weight_vector(dict.fromkeys(terms, 1.0)))
    try:
        return graph.heat_from(maps)[0]
    finally:
        graph.cfg = cfg
        graph.weights.copy_(weights)


def measure(name: str, bundles: Path, cache: Path) -> dict:
    ds = datasets.load(name, cache)
    det, _ = bundle.load(bundles / f"{name}.kgm")
    graph, maps = term_maps(det, ds)
    out = {}
    for terms in SETS:
        row = {rule: image_scores(graph, maps, terms, rule).double().numpy() for rule in COMBINE_RULES}
        out[" + ".join(terms)] = {rule: round(float(roc_auc_score(ds.labels, s)), 4) for rule, s in row.items()}
    return out


def main(argv: list[str] | None = None) -> int:
    return lever_main(
        argv,
        description=__doc__.splitlines()[0],
        out="bench_out/combination_levers.json",
        threads=2,
        measure=lambda name, args: measure(name, args.bundles, args.cache),
        extra=lambda ap: ap.add_argument("--bundles", type=Path, default=Path("bench_out/bundles")),
    )


if __name__ == "__main__":
    raise SystemExit(main())
