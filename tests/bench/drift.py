"""Drift section: can an operator trust the drift state? False alarms on known-good images, and how many changed
images it takes to notice a change.

Per demo part kind, one model: the quality section's bundle for that set when it ran, else one trained for a fixed
number of steps (`--drift-steps`) on the same known-good images. Then, with the service's defaults (window,
minimum images, sigmas from `service.settings.Settings`):

1. **False alarms.** FRESH known-good images, rendered with an rng key no training or holdout image uses
   (`drift_images.FRESH_SPLIT`), go through one `DriftMonitor` one image at a time, assessed after each as the
   service does (`false_alarm_rate` over `assessments`). Those windows overlap (each assessment shares all but
   one image with the one before), so the same images are also cut into disjoint windows of as many images as the
   monitor compares (`compared_images`, from `DriftReport.n`), each fed to a fresh monitor and assessed once:
   `independent_windows`, their alarms and a Clopper-Pearson 95 % upper bound on that rate.
2. **Detection delay.** A stream of `good_before` fresh known-good images, then changed ones: brighter
   (`GAIN`), blurred (Gaussian, `BLUR_SIGMA` px), shifted (`SHIFT_PX` px right and down, edge pixels repeated;
   the three in `drift_images.py`)
   and another material (fresh images of `MATERIAL[kind]`, converted to the model's colour mode as the service
   converts any upload). `delay_images` counts the changed images until the first `drifting` assessment (null:
   not within `max_changed`), median over `repeats` streams with other images each (`delay`: every run, the
   false alarms before the change, and `runs_drifting_at_change`, whose delay is inherited from a false alarm).
   The figures hold for this model and its holdout: the limit comes from that holdout, and another draw of it
   gives another false-alarm rate; `feature_effective_dimension` says how few directions the raw features use
   (the monitor compares whitened principal components, `service.drift.Whitening`).

Every image reaches the model as the service gets it: a PNG file (the changed ones quantised to 8 bits like a
camera's) decoded by `training.data.decode_image`. Features come from `Detector.embed_images`, checked on a sample
against the service's own path (`score_and_embed` over the prepared inputs, each image's row from
`Detector.finish`): `feature_check` is their largest difference.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import numpy as np
import torch
from knowngood.service.drift import DriftMonitor, DriftReport
from knowngood.service.settings import Settings
from knowngood.training import bundle
from knowngood.training.detector import Detector
from knowngood.training.metrics import binomial_ci
from threadpoolctl import threadpool_limits

from tests.bench import datasets, knowngood_runner
from tests.bench.drift_images import BLUR_SIGMA, FRESH_SPLIT, GAIN, SHIFT_PX, changed, render_fresh

KINDS = ("bracket", "weave")  # the two kinds with a fixed layout: a stamped plate (gray), a woven fabric (RGB)
MATERIAL = {"bracket": "weave", "weave": "bracket", "casting": "bracket"}  # "another material" for each kind
CHANGES = ("brightness", "blur", "shift", "material")
FEATURE_TOLERANCE = 1e-4  # the fast path must give the service's features, up to float rounding


def _default(name: str):
    return Settings.model_fields[name].default


@dataclass(frozen=True)
class DriftSettings:
    window: int = _default("drift_window")
    min_images: int = _default("drift_min_images")
    sigmas: float = _default("drift_sigmas")
    fresh: int = 3000  # fresh known-good images per part kind (false alarms; the delay streams' good images)
    good_before: int = 40  # known-good images before the change
    max_changed: int = 60  # changed images fed before giving up
    repeats: int = 5  # delay streams per change, each with other images

    def monitor(self) -> dict:
        return {"window": self.window, "min_images": self.min_images, "sigmas": self.sigmas}


QUICK = DriftSettings(fresh=600, repeats=2)


def kinds_for(only: list[str] | None, quick: bool) -> list[str]:
    """The part kinds the section measures: the demo sets among `--only`, else both fixed-layout kinds."""
    if only:
        return [datasets.DEMO[name] for name in only if name in datasets.DEMO]
    return ["bracket"] if quick else list(KINDS)


# ---------------------------------------------------------------------------------------------------- features


def features(det: Detector, images: list[np.ndarray]) -> np.ndarray:
    """(N, F) drift features of native-resolution images (a tiled model: the mean over each image's tiles)."""
    return det.embed_images(images)


def service_features(det: Detector, images: list[np.ndarray]) -> np.ndarray:
    """(N, F) as `service.pipeline.inspect_uploads` gets them: one scoring pass over every image's prepared input
    (tiles included), each image's row from `Detector.finish`."""
    prepared = [det.prepare_one(im) for im in images]
    scores, heats, emb = det.score_and_embed(torch.cat([p.x for p in prepared]))
    out, start = [], 0
    for p in prepared:
        rows = slice(start, start + len(p.x))
        start = rows.stop
        out.append(det.finish(p, scores[rows], heats[rows], emb[rows])[2])
    return np.stack(out)


def feature_check(det: Detector, images: list[np.ndarray]) -> float:
    """Largest difference between `features` and the service's features on these images; refuses to go on when
    they differ, since the figures would then not be the service's."""
    diff = float(np.abs(features(det, images) - service_features(det, images)).max())
    if diff > FEATURE_TOLERANCE:
        raise RuntimeError(f"the bench's drift features differ from the service's by {diff:.3g}")
    return diff


# ---------------------------------------------------------------------------------------------------- measuring


def stream_reports(frechet: dict, feats: np.ndarray, *, window: int, min_images: int, sigmas: float) -> list:
    """One monitor fed image by image and assessed after each image, as the service assesses on each request."""
    monitor = DriftMonitor(frechet, window=window)
    reports = []
    # one BLAS thread: the (F, F) eigendecompositions of a distance ran ~7x slower on two contended OpenBLAS
    # threads of the shared 2-core bench machine (63 vs 9 ms); the figures do not depend on it
    with threadpool_limits(limits=1, user_api="blas"):
        for row in np.asarray(feats):
            monitor.add(row[None])
            reports.append(monitor.assess(min_images=min_images, sigmas=sigmas))
    return reports


def assessed(reports: list[DriftReport]) -> list[DriftReport]:
    """The reports that reached a verdict (ok or drifting); refuses a bundle without a drift reference."""
    if any(r.status == "no_reference" for r in reports):
        raise RuntimeError(f"no drift reference: {reports[0].detail}")
    return [r for r in reports if r.drifting is not None]


def _ratio(reports: list[DriftReport]) -> dict:
    """distance / limit (an alarm above 1): median, 95th percentile, largest."""
    r = np.array([rep.distance / rep.limit for rep in reports])
    return {
        "median": round(float(np.median(r)), 3),
        "p95": round(float(np.quantile(r, 0.95)), 3),
        "max": round(float(r.max()), 3),
    }


def false_alarms(frechet: dict, feats: np.ndarray, *, window: int, min_images: int, sigmas: float) -> dict:
    """Known-good features (N, F) -> how often the monitor says drifting: over the overlapping assessments of one
    stream, and over disjoint windows each assessed once by a fresh monitor (independent of each other)."""
    kw = dict(window=window, min_images=min_images, sigmas=sigmas)
    stream = assessed(stream_reports(frechet, feats, **kw))
    if not stream:
        raise ValueError(f"{len(feats)} images never reach the {min_images} an assessment needs")
    compared = max(r.n for r in stream)
    size = max(compared, min_images)  # the monitor compares the last `compared` images of each window
    ends = range(size, len(feats) + 1, size)
    independent = [assessed(stream_reports(frechet, feats[e - size : e], **kw))[-1] for e in ends]
    alarms = sum(r.status == "drifting" for r in stream)
    k = sum(r.status == "drifting" for r in independent)
    last = stream[-1]
    return {
        "false_alarm_rate": alarms / len(stream),
        "assessments": len(stream),
        "false_alarms": alarms,
        "windows_overlap": compared > 1,
        "compared_images": compared,
        "independent_windows": len(independent),
        "independent_false_alarms": k,
        "independent_false_alarm_rate": k / len(independent),
        "independent_rate_upper_95": round(binomial_ci(k, len(independent))[1], 4),
        "distance_over_limit": _ratio(independent),
        "reference": {"mean": last.reference_mean, "std": last.reference_std, "limit": last.limit},
    }


@dataclass(frozen=True)
class Delay:
    images: int | None  # changed images until the first `drifting` assessment; None: not within the changed ones
    alarms_before: int  # `drifting` assessments while the stream was still known-good (false alarms)
    drifting_at_change: bool  # the last known-good image already left it drifting: `images` then says little
    final_ratio: float  # distance / limit after the last changed image


def detection_delay(
    frechet: dict, good: np.ndarray, changed_feats: np.ndarray, *, window: int, min_images: int, sigmas: float
) -> Delay:
    """A stream of known-good features (N, F), then changed ones (M, F), assessed after every image."""
    feats = np.concatenate([good, changed_feats])
    reports = stream_reports(frechet, feats, window=window, min_images=min_images, sigmas=sigmas)
    before = reports[: len(good)]
    after = [i + 1 for i, r in enumerate(reports[len(good) :]) if r.status == "drifting"]
    last = reports[-1]
    return Delay(
        images=after[0] if after else None,
        alarms_before=sum(r.status == "drifting" for r in before),
        drifting_at_change=bool(before) and before[-1].status == "drifting",
        final_ratio=last.distance / last.limit,
    )


# ---------------------------------------------------------------------------------------------------- per kind


def model_for(kind: str, *, cache: Path, bundles: dict, steps: int, bundle_dir: Path, log) -> tuple:
    """(detector, Fréchet reference, how it was made) for one part kind."""
    name = f"demo-{kind}"
    if name in bundles:
        path, source = bundles[name], "the quality section's bundle"
    else:
        ds = datasets.load(name, cache)
        log(f"[drift {kind}] training {steps} steps on {len(ds.train)} known-good images")
        bundle_dir.mkdir(parents=True, exist_ok=True)
        path = bundle_dir / f"drift-{name}-{steps}steps.kgm"
        knowngood_runner.train(ds.train, path, minutes=None, steps=steps, channels=ds.channels)
        source = f"trained for the drift section, {steps} steps"
    det, frechet = bundle.load(path)
    info = det.manifest.get("training", {})
    return (
        det,
        frechet,
        {
            "source": source,
            "bundle": path.name,
            "steps": info.get("steps_done"),
            "fit_seconds": info.get("seconds"),
            "holdout_images": len(frechet.get("holdout_features", [])),
            "feature_effective_dimension": effective_dimension(frechet["train_sigma"]),
        },
    )


def effective_dimension(sigma: np.ndarray) -> float:
    """(Σλ)² / Σλ² of a covariance's eigenvalues: how many directions the spread really uses. Few: on the raw
    features the distance would hear little but the loudest direction, which is why the monitor whitens them."""
    lam = np.clip(np.linalg.eigvalsh(sigma), 0, None)
    return round(float(lam.sum() ** 2 / (lam**2).sum()), 2)


def _changed_images(kind: str, how: str, bases: list[np.ndarray], repeat: int) -> list[np.ndarray]:
    if how == "material":
        return render_fresh(MATERIAL[kind], len(bases), start=repeat * len(bases))
    return changed(bases, how)


def delays(det: Detector, frechet: dict, kind: str, pool: list, pool_feats: np.ndarray, cfg: DriftSettings) -> dict:
    """{change: {median, runs, ...}}; runs hold None for 'not within max_changed'. Stream r takes its good images
    and the changed images' originals from its own slice of the pool (the same good images for every change)."""
    step = cfg.good_before + cfg.max_changed
    out = {}
    for how in CHANGES:
        found = []
        for r in range(cfg.repeats):
            lo = r * step
            good = pool_feats[lo : lo + cfg.good_before]
            bases = pool[lo + cfg.good_before : lo + step]
            found.append(
                detection_delay(frechet, good, features(det, _changed_images(kind, how, bases, r)), **cfg.monitor())
            )
        runs = [d.images for d in found]
        median = float(np.median([np.inf if d is None else d for d in runs]))  # a run that never alarmed: infinite
        out[how] = {
            "median": median if np.isfinite(median) else None,
            "runs": runs,
            "alarms_before_change": sum(d.alarms_before for d in found),
            "runs_drifting_at_change": sum(d.drifting_at_change for d in found),
            "final_distance_over_limit": round(float(np.median([d.final_ratio for d in found])), 3),
        }
    return out


def measure_kind(det: Detector, frechet: dict, kind: str, cfg: DriftSettings, log) -> dict:
    start = time.monotonic()
    pool = render_fresh(kind, cfg.fresh)
    check = feature_check(det, pool[:16])
    pool_feats = features(det, pool)
    fa = false_alarms(frechet, pool_feats, **cfg.monitor())
    log(
        f"[drift {kind}] false alarms {fa['false_alarms']} of {fa['assessments']} assessments "
        f"({fa['false_alarm_rate']:.2%}); {fa['independent_false_alarms']} of {fa['independent_windows']} "
        f"independent windows of {fa['compared_images']} images"
    )
    delay = delays(det, frechet, kind, pool, pool_feats, cfg)
    for how, d in delay.items():
        log(f"[drift {kind}] {how:10s} delay {d['runs']} images (median {d['median']})")
    return {
        **fa,
        "delay_images": {how: d["median"] for how, d in delay.items()},
        "delay": delay,
        "feature_check": check,
        "seconds": round(time.monotonic() - start, 1),
    }


def section(kinds: list[str], *, cache: Path, bundle_dir: Path, bundles: dict, steps: int, quick: bool, log) -> dict:
    """The bench JSON's `drift` object: settings, then per part kind its model and figures."""
    cfg = QUICK if quick else DriftSettings()
    if cfg.fresh < cfg.repeats * (cfg.good_before + cfg.max_changed):
        cfg = replace(cfg, fresh=cfg.repeats * (cfg.good_before + cfg.max_changed))
    out = {
        "settings": {
            **asdict(cfg),
            "changes": {
                "brightness": f"gain {GAIN:g}, clipped at white",
                "blur": f"Gaussian, sigma {BLUR_SIGMA:g} px",
                "shift": f"{SHIFT_PX} px right and down, edge pixels repeated",
                "material": {k: f"fresh {MATERIAL[k]} images" for k in kinds},
            },
            "fresh_images": f"demo_parts image_rng split key {FRESH_SPLIT} (never a training or holdout image)",
            "training_steps_when_trained_here": steps,
        }
    }
    for kind in kinds:
        det, frechet, model = model_for(kind, cache=cache, bundles=bundles, steps=steps, bundle_dir=bundle_dir, log=log)
        out[kind] = {"model": model, **measure_kind(det, frechet, kind, cfg, log)}
    return out


def _delay_cell(d: dict, most: int) -> str:
    cell = f"not within {most}" if d["median"] is None else f"{d['median']:g}"
    k = d["runs_drifting_at_change"]
    return cell + (f" ({k} of {len(d['runs'])} runs drifting before the change)" if k else "")


def markdown(drift: dict) -> str:
    """Part kinds x (false alarms, median delay per change)."""
    n = drift["settings"]["max_changed"]
    head = "| part kind | false alarms (assessments) | independent windows | " + " | ".join(CHANGES) + " |"
    lines = [head, "| --- |" + " ---: |" * (2 + len(CHANGES))]
    for kind, d in drift.items():
        if kind == "settings":
            continue
        cells = [f"{d['false_alarm_rate']:.2%} ({d['assessments']})"]
        cells.append(f"{d['independent_false_alarms']} of {d['independent_windows']} ({d['compared_images']} images)")
        cells += [_delay_cell(d["delay"][h], n) for h in CHANGES]
        lines.append(f"| {kind} | " + " | ".join(cells) + " |")
    return "\n".join(lines)
