"""Which terms enter a model's heatmap, with which weights, which residual shift and which memory stride: chosen at
train time from synthetic defects pasted into held-out known-good images (`synthetic.py`), never from a labelled
holdout.

Every candidate term is computed once on the held-out known-good images and on their defective copies, each
standardised as the final model will standardise it; every combination of weights is then scored by how well it
separates the two (image AUROC, scikit-learn); how well its heatmap finds the pasted masks (pixel AUROC on a fixed
sample of pixels) only breaks ties, e.g. when several combinations separate the images perfectly. A share of the
pixel AUROC in the criterion favoured terms whose maps are sharp at pasted masks over those that rank real defective
images (README, levers). The combinations: every set of terms at weight 1 (one residual shift and one memory stride
at most), each set of two or more under both rules of `ScoringGraph.heat_from` (the maps' maximum, their mean), then
the best set with each of its terms at half weight. The winner and the evidence (each term alone, the best
combinations) go into the bundle.
"""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import torch
from knowngood.training.config import COMBINE_RULES, MAX_MEMORY_SIZE, MEMORY_POOLS, TERM_FIELDS, ModelConfig
from knowngood.training.scoring import ScoringGraph, images_per_pass
from knowngood.training.synthetic import paste_defects
from sklearn.metrics import roc_auc_score

PIXEL_SAMPLE = 20000
TOLERANCE = 0.005  # image AUROC differences below this count as ties (see _ranked)
SYNTHETIC_COPIES = 5  # defective copies of each held-out image, each of another kind (synthetic.KINDS)
FINE_MEMORY_AREA_SIDE = 128  # the working side at which the 4 px memory holds `memory_size` entries
FINE_MEMORY_AREA_CAP = 4  # at most this many times `memory_size` (reached at 256 x 256 px)
FIELDS = {"critic": "kappa"}  # a candidate term whose weight field in ModelConfig has another name


def fine_memory_entries(memory_size: int, shape: tuple[int, int] | None) -> int:
    """Entries of the 4 px memory for a working shape (h, w): `memory_size` per 128 x 128 px of working area, from
    1 to `FINE_MEMORY_AREA_CAP` times `memory_size`, so a larger working size keeps about as many entries per
    image position as 128 px (a 256 px model holds 16384). Measured (README, levers): at 256 px, 4096 -> 16384
    entries raised the 4 px memory's image AUROC on random line art 0.809 -> 0.874 and on the 640 px casting
    0.798 -> 0.832; at 128 px four times the entries did nothing (bracket 0.962 -> 0.961)."""
    h, w = shape or (FINE_MEMORY_AREA_SIDE, FINE_MEMORY_AREA_SIDE)
    factor = min(FINE_MEMORY_AREA_CAP, max(1.0, h * w / FINE_MEMORY_AREA_SIDE**2))
    return min(MAX_MEMORY_SIZE, int(round(factor * memory_size)))


def candidates(
    shifts: tuple[int, ...], memory_size: int = ModelConfig.memory_size, shape: tuple[int, int] | None = None
) -> dict[str, dict]:
    """Candidate name -> the settings it stands for. Alternatives of one term are named term@setting: the image
    residual at each shift (pixel@0, pixel@1) and the memory at each patch stride in px (memory@4, memory@8). At
    128 px the coarser memory holds pool² x `memory_size` entries, as many multiply-adds per image as the finer one;
    above 128 px the finer one grows with the working area (`fine_memory_entries`, at `shape`), the coarser one
    does not (16384 -> 65536 entries at 256 px lost on random line art, 0.835 -> 0.800)."""
    out = {f"pixel@{s}": {"pixel": 1.0, "residual_shift": s} for s in shifts}
    out |= {"critic": {"kappa": 1.0}, "perceptual": {"perceptual": 1.0}}
    for pool in MEMORY_POOLS:
        size = fine_memory_entries(memory_size, shape) if pool == 1 else min(MAX_MEMORY_SIZE, pool * pool * memory_size)
        out[f"memory@{4 * pool}"] = {"memory": 1.0, "memory_pool": pool, "memory_size": size}
    return out | {"adversarial": {"adversarial": 1.0}}


def _field(name: str) -> str:
    """The weight field of a candidate: term@setting -> term, critic -> kappa."""
    term = name.split("@")[0]
    return FIELDS.get(term, term)


REFERENCE = ("feature_mean", "feature_std", "memory", "memory_sq", "memory_centre")  # buffers fitted by `fit_features`


@dataclasses.dataclass
class Choice:
    cfg: ModelConfig
    evidence: dict
    graphs: dict[str, ScoringGraph] = dataclasses.field(default_factory=dict, repr=False)

    def adopt_reference(self, graph: ScoringGraph) -> None:
        """Copies the pretrained terms' fitted reference (statistics, memory) from the candidates into `graph`; the
        memory from the candidate of the graph's own stride (memory@4 and memory@8 both hold one)."""
        own = dict(graph.named_buffers())
        stride = (graph.cfg.memory_pool, graph.cfg.memory_size)
        for candidate in self.graphs.values():
            same_stride = (candidate.cfg.memory_pool, candidate.cfg.memory_size) == stride
            for name, buf in candidate.named_buffers():
                if name in REFERENCE and name in own and (same_stride or not name.startswith("memory")):
                    own[name].copy_(buf)


def term_summary(evidence: dict) -> str:
    """One line for `train`'s output and the report: what was chosen and why (the bundle's score.choice)."""
    chosen = [f"{name} {w:g}" for name, w in evidence["chosen"].items() if w > 0]
    terms = ", ".join(chosen) + (f" ({evidence.get('combine', 'max')} of their maps)" if len(chosen) > 1 else "")
    alone = max(evidence["alone"], key=lambda k: evidence["alone"][k]["image_auroc"])
    return (
        f"terms {terms}: synthetic-defect image AUROC {evidence['image_auroc']:.3f}, pixel AUROC "
        f"{evidence['pixel_auroc']:.3f} on {evidence['images']['synthetic']} pasted defects (best single term: "
        f"{alone}, {evidence['alone'][alone]['image_auroc']:.3f})"
    )


def _with_weights(cfg: ModelConfig, **settings) -> ModelConfig:
    """cfg with every term's weight 0 except those in `settings` (and the residual shift, when given)."""
    return dataclasses.replace(cfg, **{**dict.fromkeys(TERM_FIELDS, 0.0), **settings})


def candidate_graphs(
    base: ModelConfig, nets, perceptual, shifts: tuple[int, ...], feature_critic=None
) -> dict[str, ScoringGraph]:
    """One scoring graph per candidate term (sharing the trained nets and the pretrained net); a term whose
    weight is 0 in `base` is not a candidate, nor the adversarial term without a trained feature critic."""
    out = {}
    for name, settings in candidates(shifts, base.memory_size, base.shape).items():
        if getattr(base, _field(name)) <= 0 or (name == "adversarial" and feature_critic is None):
            continue  # left out by the caller, or not trained
        cfg = _with_weights(base, **settings)
        out[name] = ScoringGraph(
            cfg, *nets, perceptual=perceptual if cfg.pretrained else None, feature_critic=feature_critic
        )
    return out


@torch.no_grad()
def _z_maps(graph: ScoringGraph, x: torch.Tensor) -> torch.Tensor:
    """(N, H, W) standardised map of a one-term graph, in passes of at most 8 images (`images_per_pass`)."""
    graph.eval()
    batch = images_per_pass(graph.cfg, most=8)  # as `fit_standardisation`
    parts = []
    for i in range(0, len(x), batch):
        maps = graph.term_maps(x[i : i + batch])
        parts.append(((maps - graph.term_mean) / graph.term_std)[:, 0])
    return torch.cat(parts)


def _image_scores(
    z: dict[str, torch.Tensor], weights: dict[str, float], top_k: int, rule: str = "max"
) -> tuple[torch.Tensor, torch.Tensor]:
    """The heatmaps (N, H, W) and image scores of one combination: the weighted maps' maximum or mean (`rule`,
    as `ScoringGraph.heat_from`), taken one term at a time (not stacked first: with 2000 training images the stack
    set the training's peak memory)."""
    heat = None
    for n, w in weights.items():
        if w > 0:
            term = z[n] * w  # a new tensor: the in-place updates below never touch z
            if heat is None:
                heat = term
            elif rule == "mean":
                heat.add_(term)
            else:
                torch.maximum(heat, term, out=heat)
    if rule == "mean":
        heat.div_(sum(w for w in weights.values() if w > 0))
    heat = heat.clamp_(min=0)
    return heat, heat.flatten(1).topk(top_k, dim=1).values.mean(1)


def _subsets(names: list[str]):
    """(rule, weights): every non-empty set of terms at weight 1, with at most one of each term's alternatives
    (term@setting: one residual shift, one memory stride); a single term under the maximum only (both rules give
    the same map), two or more under each rule."""
    groups: dict[str, list[str]] = {}
    for n in names:
        groups.setdefault(n.split("@")[0], []).append(n)
    for picks in itertools.product(*([None, *alternatives] for alternatives in groups.values())):
        terms = [n for n in picks if n is not None]
        rules = COMBINE_RULES if len(terms) > 1 else COMBINE_RULES[:1]
        for rule in rules if terms else ():
            yield rule, dict.fromkeys(terms, 1.0)


def _halved(rule: str, best: dict[str, float]):
    """The best set with one of its terms at half weight (when it has more than one), under the same rule."""
    if len(best) > 1:
        for name in best:
            yield rule, {**best, name: 0.5}


def _ranked(results: list[tuple[tuple[str, dict], dict]]) -> list[tuple[tuple[str, dict], dict]]:
    """Best first: among the combinations within TOLERANCE of the best image AUROC, the one with the fewest terms
    (then the higher image AUROC, then the higher pixel AUROC). A term enters only if it measurably helps on the
    pasted defects; more terms for a difference inside the noise of a few dozen images would choose by chance."""
    top = max(e["image_auroc"] for _, e in results)

    def key(r):
        near = r[1]["image_auroc"] >= top - TOLERANCE
        return (not near, len(r[0][1]) if near else 0, -r[1]["image_auroc"], -r[1]["pixel_auroc"])

    return sorted(results, key=key)


def choose_terms(
    base: ModelConfig,
    nets,
    perceptual,
    *,
    fit_x: torch.Tensor,
    std_x: torch.Tensor,
    good_x: torch.Tensor,
    shifts: tuple[int, ...] = (0, 1),
    feature_critic=None,
    fit_phi: torch.Tensor | None = None,
    seed: int = 0,
) -> Choice:
    """Fits every candidate term (pretrained reference on `fit_x`, standardisation on `std_x`), pastes synthetic
    defects into `good_x` (held-out known-good images the nets and the standardisation never saw) and returns the
    configuration whose heatmap separates them best, with the evidence."""
    graphs = candidate_graphs(base, nets, perceptual, shifts, feature_critic)
    bad_x, masks = paste_defects(good_x, copies=SYNTHETIC_COPIES, seed=seed)
    z_good, z_bad = {}, {}
    if fit_phi is None:  # the caller's pretrained features of fit_x, when it has them: no second pass
        fit_phi = next((g.pretrained_features(fit_x) for g in graphs.values() if g.perceptual is not None), None)
    for name, graph in graphs.items():
        graph.fit_features(fit_x, seed=seed, feats=fit_phi)
        graph.fit_standardisation(std_x)
        z_good[name], z_bad[name] = _z_maps(graph, good_x), _z_maps(graph, bad_x)
    z = {n: torch.cat([z_good.pop(n), z_bad.pop(n)]) for n in graphs}  # popped: no second copy of every map
    labels = np.r_[np.zeros(len(good_x)), np.ones(len(bad_x))]
    pix_labels = torch.cat([torch.zeros(len(good_x), *masks.shape[1:], dtype=torch.bool), masks]).flatten()
    sample = torch.from_numpy(
        np.random.default_rng(seed).choice(len(pix_labels), min(PIXEL_SAMPLE, len(pix_labels)), replace=False)
    )
    top_k = graphs[next(iter(graphs))].top_k

    def evaluate(combo: tuple[str, dict[str, float]]) -> dict:
        heat, scores = _image_scores(z, combo[1], top_k, rule=combo[0])
        img = float(roc_auc_score(labels, scores.numpy()))
        pix = float(roc_auc_score(pix_labels[sample].numpy(), heat.flatten()[sample].numpy()))
        return {"image_auroc": round(img, 4), "pixel_auroc": round(pix, 4)}

    alone = {n: evaluate(("max", {n: 1.0})) for n in graphs}

    results = _ranked([(combo, evaluate(combo)) for combo in _subsets(list(graphs))])
    results = _ranked(results + [(combo, evaluate(combo)) for combo in _halved(*results[0][0])])
    (rule, best), best_eval = results[0]
    settings = {"combine": rule}
    for name, w in best.items():
        if w > 0:
            settings.update(candidates(shifts, base.memory_size, base.shape)[name], **{_field(name): w})
    cfg = _with_weights(base, **settings)
    evidence = {
        "method": "synthetic defects (CutPaste rectangles and scars, Perlin-noise blobs and areas, cracks, cut-off "
        "regions) in held-out known-good images",
        "criterion": "image AUROC; pixel AUROC breaks ties",
        "images": {"good": len(good_x), "synthetic": len(bad_x)},
        "chosen": {n: float(best.get(n, 0.0)) for n in graphs},
        "combine": rule,
        "image_auroc": best_eval["image_auroc"],
        "pixel_auroc": best_eval["pixel_auroc"],
        "alone": alone,
        "runners_up": [
            {"weights": {n: w for n, w in combo.items() if w > 0}, "combine": combo_rule, **e}
            for (combo_rule, combo), e in results[1:6]
        ],
    }
    return Choice(cfg=cfg, evidence=evidence, graphs=graphs)
