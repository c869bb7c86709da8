"""Resumable training checkpoints: nets, optimisers, RNG states and the best state so far.

Written with torch.save and read with weights_only=True, so loading cannot run code from the file.
"""

from __future__ import annotations

import os
from pathlib import Path

import torch
from knowngood.training.config import to_dict
from knowngood.training.errors import BadConfig


def _signature(fitter) -> dict:
    t = to_dict(fitter.tcfg)
    t.pop("minutes")  # a resumed run may get a new time budget
    return {"model": to_dict(fitter.mcfg), "train": t, "n_train": len(fitter.train_x)}


def save_checkpoint(fitter, path: Path) -> None:
    state = {
        "signature": _signature(fitter),
        "step": fitter.step,
        "nets": {k: n.state_dict() for k, n in (("E", fitter.E), ("G", fitter.G), ("D", fitter.D))},
        "opt": {"d": fitter.opt_d.state_dict(), "ge": fitter.opt_ge.state_dict()},
        "rng": {"torch": torch.get_rng_state(), "gen": fitter.gen.get_state()},
        "history": fitter.history,
        "best": fitter.best,
    }
    tmp = Path(str(path) + ".tmp")
    torch.save(state, tmp)
    os.replace(tmp, path)


def load_checkpoint(fitter, path: Path) -> None:
    state = torch.load(path, weights_only=True, map_location="cpu")
    if state["signature"] != _signature(fitter):
        raise BadConfig(f"{path}: checkpoint is from a different configuration or data; delete it to start afresh")
    for k, n in (("E", fitter.E), ("G", fitter.G), ("D", fitter.D)):
        n.load_state_dict(state["nets"][k])
    fitter.opt_d.load_state_dict(state["opt"]["d"])
    fitter.opt_ge.load_state_dict(state["opt"]["ge"])
    torch.set_rng_state(state["rng"]["torch"])
    fitter.gen.set_state(state["rng"]["gen"])
    fitter.step, fitter.history = state["step"], state["history"]
    fitter.best = tuple(state["best"]) if state["best"] is not None else None
