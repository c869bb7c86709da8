"""Training-loop contracts: the gradient penalty, reproducibility, resuming."""

import numpy as np
import pytest
import torch
from knowngood.training.config import ModelConfig, TrainConfig
from knowngood.training.errors import BadConfig
from knowngood.training.fit import Fitter, fit, gradient_penalty, split_indices, stalled
from torch import nn


class LinearCritic(nn.Module):
    def __init__(self, w: torch.Tensor):
        super().__init__()
        self.w = nn.Parameter(w)

    def forward(self, x):
        return (x.flatten(1) * self.w).sum(1)


def test_gradient_penalty_matches_linear_critic():
    # Gulrajani et al. 2017: for D(x) = w·x the gradient is w everywhere, so GP = (‖w‖₂ − 1)² exactly
    torch.manual_seed(0)
    w = torch.randn(1 * 4 * 4) * 0.7
    critic = LinearCritic(w)
    real, fake = torch.rand(8, 1, 4, 4), torch.rand(8, 1, 4, 4)
    gp = gradient_penalty(critic, real, fake, torch.Generator().manual_seed(0))
    assert gp.item() == pytest.approx((w.norm().item() - 1) ** 2, rel=1e-5)
    unit = LinearCritic(w / w.norm())
    assert gradient_penalty(unit, real, fake, torch.Generator().manual_seed(0)).item() == pytest.approx(0, abs=1e-10)


def _data(n=24, size=32, seed=0):
    g = torch.Generator().manual_seed(seed)
    return torch.rand(n, 1, size, size, generator=g) * 0.2 + 0.4


TINY = ModelConfig(size=32, channels=1, width=8, z_channels=4)


def _tcfg(**kw):
    base = dict(steps=6, minutes=0, batch=4, patch=32, eval_every=3, checkpoint_every=3, critic_steps=1, seed=3)
    return TrainConfig(**{**base, **kw})


def test_same_seed_gives_same_weights():
    x, v = _data(), _data(8, seed=1)
    a = fit(x, v, TINY, _tcfg(), progress=False)
    b = fit(x, v, TINY, _tcfg(), progress=False)
    for pa, pb in zip(a.generator.state_dict().values(), b.generator.state_dict().values()):
        assert torch.equal(pa, pb)
    c = fit(x, v, TINY, _tcfg(seed=4), progress=False)
    assert not torch.equal(next(iter(a.generator.parameters())), next(iter(c.generator.parameters())))


def test_resume_from_checkpoint_equals_uninterrupted_run(tmp_path, monkeypatch):
    x, v = _data(), _data(8, seed=1)
    full = fit(x, v, TINY, _tcfg(), progress=False)
    ckpt = tmp_path / "run.ckpt"
    real_step = Fitter.train_step

    def crash_at_step_5(self, encoder_only):
        if self.step == 4:
            raise KeyboardInterrupt
        return real_step(self, encoder_only)

    monkeypatch.setattr(Fitter, "train_step", crash_at_step_5)
    with pytest.raises(KeyboardInterrupt):
        fit(x, v, TINY, _tcfg(), checkpoint=ckpt, progress=False)  # the checkpoint of step 3 survives
    monkeypatch.setattr(Fitter, "train_step", real_step)
    resumed = fit(x, v, TINY, _tcfg(), checkpoint=ckpt, progress=False)
    assert resumed.steps_done == full.steps_done == 6
    for pa, pb in zip(full.encoder.state_dict().values(), resumed.encoder.state_dict().values()):
        assert torch.equal(pa, pb)
    with pytest.raises(BadConfig, match="different configuration"):
        fit(x, v, TINY, _tcfg(seed=9), checkpoint=ckpt, progress=False)


@pytest.mark.parametrize(
    "errors, patience, steps_done, chosen",
    [
        ([5, 4, 3, 3.5, 3.6, 3.7, 3.8, 3.9], 3, 6, 3),  # best at 3, no lower for 3 steps: stops at 6
        ([9, 8, 7, 6, 5, 4, 3, 2] + [2.5] * 12, 3, 16, 8),  # best at 8: goes on as many steps again, to 16
        ([5, 4, 3] + [3.5] * 17, 0, 20, 3),  # patience 0: the whole budget
    ],
)
def test_fitting_stops_early_once_the_held_out_error_stops_falling(monkeypatch, errors, patience, steps_done, chosen):
    """Early stopping (`stalled`): the held-out error evaluated every step is scripted; the run ends `patience`
    steps after its best, and no sooner than as many steps again as the best took; the best checkpoint is kept."""
    x, v = _data(), _data(8, seed=1)
    script = iter(errors)
    monkeypatch.setattr(Fitter, "evaluate", lambda self: {"val_rec": next(script), "fd": 0.0, "fd_floor": 0.0})
    result = fit(x, v, TINY, _tcfg(steps=20, eval_every=1, checkpoint_every=1, patience=patience), progress=False)
    assert (result.steps_done, result.chosen_step) == (steps_done, chosen)
    assert result.stopped_early == (steps_done < 20)
    assert stalled(1750, 750, 1000) and not stalled(1500, 750, 1000)
    assert stalled(3000, 1500, 1000) and not stalled(2750, 1500, 1000)
    with pytest.raises(BadConfig, match="patience"):
        _tcfg(patience=-1)


def test_two_stage_recipe_trains_encoder_last():
    x, v = _data(), _data(8, seed=1)
    r = fit(x, v, TINY, _tcfg(recipe="two_stage", steps=6, gan_share=0.5), progress=False)
    assert r.steps_done == 6 and r.history[-1]["val_rec"] > 0


def test_split_is_disjoint_and_deterministic():
    a = split_indices(100, 0.25, 0)
    b = split_indices(100, 0.25, 0)
    assert all(np.array_equal(p, q) for p, q in zip(a, b))
    assert sum(len(p) for p in a) == 100 and len(set(np.concatenate(a))) == 100
    assert len(a[1]) + len(a[2]) == 25


DEVICES = ["cpu"] + (["cuda"] if torch.cuda.is_available() else [])


@pytest.mark.parametrize("device", DEVICES)
def test_fit_runs_on_every_device_present(device):
    # evaluation reads the critic's features into NumPy: from an accelerator they must come back to the host first
    x, v = _data(), _data(8, seed=1)
    r = fit(x, v, TINY, _tcfg(steps=3, eval_every=2), progress=False, device=device)
    assert r.steps_done == 3 and [h["step"] for h in r.history] == [2, 3]
    assert all(np.isfinite(h["val_rec"]) and np.isfinite(h["fd"]) for h in r.history)
    assert all(p.device.type == "cpu" for p in r.generator.parameters())  # handed back on the CPU, as documented


def test_progress_bar_goes_to_stderr_and_quiet_means_silent(capsys):
    # stderr is not a terminal under pytest: the bar must still work there, and never touch stdout
    x, v = _data(), _data(8, seed=1)
    fit(x, v, TINY, _tcfg(steps=10), progress=True)
    out, err = capsys.readouterr()
    assert out == ""
    last = err.replace("\r", "\n").strip().splitlines()[-1]
    assert last.startswith("100%|") and "step 10" in last and "val_rec" in last and "fd_floor" in last
    fit(x, v, TINY, _tcfg(steps=2), progress=False)
    assert capsys.readouterr() == ("", "")
