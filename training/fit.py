"""Fitting the generator, encoder and critic on known-good images (WGAN-GP + izi_f encoder loss), within a budget.

Recipe "joint" (default): each step updates the critic, then the generator and encoder together on the
adversarial loss of G(z) and the izi_f loss of G(E(x)) (an adversarially trained auto-encoder). Recipe
"two_stage" is f-AnoGAN's: a WGAN-GP first, then the encoder alone on izi_f with G and D frozen.
The checkpoint kept is the one with the lowest held-out reconstruction error (see `_evaluate` for why).
"""

from __future__ import annotations

import copy
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
from knowngood.training.augment import process_variation, random_patches
from knowngood.training.checkpoint import load_checkpoint, save_checkpoint
from knowngood.training.config import ModelConfig, TrainConfig
from knowngood.training.frechet import sample_distance
from knowngood.training.nets import Critic, Encoder, Generator, build
from tqdm import tqdm


@dataclass
class FitResult:
    encoder: Encoder
    generator: Generator
    critic: Critic
    steps_done: int
    seconds: float
    chosen_step: int
    history: list[dict] = field(default_factory=list)
    stopped_early: bool = False  # the held-out error stopped falling (`stalled`) before the steps or time ran out


def gradient_penalty(critic: Critic, real: torch.Tensor, fake: torch.Tensor, gen: torch.Generator) -> torch.Tensor:
    """WGAN-GP term E[(‖∇D(x̂)‖₂ − 1)²] on random interpolates x̂ of real and fake (Gulrajani et al. 2017)."""
    eps = torch.rand(len(real), 1, 1, 1, generator=gen).to(real.device)
    mixed = (eps * real + (1 - eps) * fake).requires_grad_(True)
    out = critic(mixed).sum()
    (grad,) = torch.autograd.grad(out, mixed, create_graph=True)
    return (grad.flatten(1).norm(dim=1) - 1).pow(2).mean()


def izi_f_loss(critic: Critic, x: torch.Tensor, recon: torch.Tensor, kappa: float) -> torch.Tensor:
    """f-AnoGAN's izi_f: pixel residual plus κ · critic-feature residual (Schlegl et al. 2019)."""
    return F.mse_loss(recon, x) + kappa * F.mse_loss(critic.features(recon), critic.features(x))


class Fitter:
    def __init__(
        self,
        train_x: torch.Tensor,
        val_x: torch.Tensor,
        mcfg: ModelConfig,
        tcfg: TrainConfig,
        device: str = "cpu",
        init: dict[str, dict] | None = None,
    ):
        torch.manual_seed(tcfg.seed)
        self.train_x, self.val_x, self.mcfg, self.tcfg = train_x, val_x, mcfg, tcfg
        self.device = torch.device(device)
        self.gen = torch.Generator().manual_seed(tcfg.seed)  # on the CPU: the same draws on any device
        nets = build(mcfg)  # built (and the seed's draws taken) either way: a continued run stays deterministic
        if init is not None:
            for key, net in zip(("E", "G", "D"), nets):
                net.load_state_dict(init[key])
        self.E, self.G, self.D = (net.to(self.device) for net in nets)
        opt = dict(lr=tcfg.lr, betas=tcfg.betas)
        self.opt_d = torch.optim.Adam(self.D.parameters(), **opt)
        self.opt_ge = torch.optim.Adam([*self.E.parameters(), *self.G.parameters()], **opt)
        self.step, self.history = 0, []
        self.best: tuple[float, int, dict] | None = None
        self.patch = min(tcfg.patch or min(mcfg.shape), *mcfg.shape)

    def batch(self) -> torch.Tensor:
        x = random_patches(self.train_x, self.tcfg.batch, self.patch, self.gen)
        x = process_variation(x, self.gen) if self.tcfg.augment else x
        return x.to(self.device)

    def noise(self, n: int, side: int) -> torch.Tensor:
        return (torch.rand(n, self.mcfg.z_channels, side, side, generator=self.gen) * 2 - 1).to(self.device)

    def train_step(self, encoder_only: bool) -> dict[str, float]:
        t, kappa = self.tcfg, self.mcfg.kappa
        side = self.patch // 8
        if not encoder_only:
            # (1) critic: L_D = D(G(z)) + D(G(E(x))) - 2 D(x) (halved) + λ·GP; G and E must not learn here
            for _ in range(t.critic_steps):
                x = self.batch()
                with torch.no_grad():
                    fake = self.G(self.noise(len(x), side))
                    recon = self.G(self.E(x)) if t.recipe == "joint" else fake
                loss_d = (self.D(fake).mean() + self.D(recon).mean()) / 2 - self.D(x).mean()
                loss_d = loss_d + t.gp_lambda * gradient_penalty(self.D, x, fake, self.gen)
                self.opt_d.zero_grad(set_to_none=True)
                loss_d.backward()
                self.opt_d.step()
        x = self.batch()
        for p in self.D.parameters():
            p.requires_grad_(False)
        if encoder_only:
            # (3) encoder alone (two-stage recipe): L_E = izi_f(x, G(E(x))); G and D frozen
            loss_adv = torch.zeros(())
            loss_rec = izi_f_loss(self.D, x, self.G(self.E(x)), kappa)
        else:
            # (2) generator (+ encoder when joint): L = -D(G(z)) [- D(G(E(x)))] + w · izi_f(x, G(E(x)))
            loss_adv = -self.D(self.G(self.noise(len(x), side))).mean()
            if t.recipe == "joint":
                recon = self.G(self.E(x))
                loss_adv = loss_adv - self.D(recon).mean()
                loss_rec = izi_f_loss(self.D, x, recon, kappa)
            else:
                loss_rec = torch.zeros(())
        self.opt_ge.zero_grad(set_to_none=True)
        (loss_adv + t.recon_weight * loss_rec).backward()
        self.opt_ge.step()
        for p in self.D.parameters():
            p.requires_grad_(True)
        self.step += 1
        out = {"G": loss_adv.item(), "rec": loss_rec.item()}
        if not encoder_only:
            out["D"] = loss_d.item()
        return out

    @torch.no_grad()
    def evaluate(self) -> dict[str, float]:
        """Held-out reconstruction error (picks the checkpoint) and Fréchet distance (shown, recorded).

        The critic's feature space moves while it trains, so Fréchet distances of different steps are not
        on one scale; the pixel reconstruction error of held-out known-good images is, and it is what the
        heatmap is made of. The Fréchet distance is compared with its own small-sample floor (real vs real).
        """
        nets = (self.E, self.G, self.D)
        modes = [n.training for n in nets]
        for n in nets:
            n.eval()
        v = self.val_x.to(self.device)
        recon = torch.cat([self.G(self.E(v[i : i + 64])) for i in range(0, len(v), 64)])
        rec = float((recon - v).abs().mean())
        gen = torch.Generator().manual_seed(1234)  # the same z every evaluation
        h, w = (side // 8 for side in self.mcfg.shape)
        z = torch.rand(len(v), self.mcfg.z_channels, h, w, generator=gen)
        z = z.to(self.device)
        fake = torch.cat([self.G(z[i : i + 64] * 2 - 1) for i in range(0, len(z), 64)])
        real_f, fake_f = (self._pooled(x) for x in (v, fake))
        half = len(real_f) // 2
        fd = sample_distance(fake_f, real_f) if len(real_f) >= 4 else float("nan")
        floor = sample_distance(real_f[:half], real_f[half:]) if half >= 2 else float("nan")
        for n, m in zip(nets, modes):
            n.train(m)
        return {"val_rec": rec, "fd": fd, "fd_floor": floor}

    def _pooled(self, x: torch.Tensor, batch: int = 64) -> np.ndarray:
        """The critic's pooled features (N, F) of x, 64 images at a time: all of a tiled model's 8000 held-out
        tiles at once made activations of over 4 GB. On the host: NumPy reads host memory only."""
        return (
            torch.cat([self.D.pooled_features(x[i : i + batch]) for i in range(0, len(x), batch)])
            .double()
            .cpu()
            .numpy()
        )

    def remember(self, metrics: dict[str, float]) -> None:
        self.history.append({"step": self.step, **{k: round(v, 6) for k, v in metrics.items()}})
        if self.best is None or metrics["val_rec"] < self.best[0]:
            state = {k: copy.deepcopy(n.state_dict()) for k, n in (("E", self.E), ("G", self.G), ("D", self.D))}
            self.best = (metrics["val_rec"], self.step, state)


def stalled(step: int, best_step: int, patience: int) -> bool:
    """Early stopping (common practice; Prechelt 1998): the held-out reconstruction error has not fallen for
    `patience` steps, nor for as many steps as the best checkpoint took (a run whose best came at step 1500 goes on
    to step 3000 at least). 0 = never. Measured on `train`'s 10 minutes (README, levers): the casting's best
    checkpoint came at step 750 of 3504 and no later one was lower, so the run ends at step 1750 with the same
    bundle."""
    return patience > 0 and step - best_step >= max(patience, best_step)


def default_device() -> str:
    """A GPU when one is present (faster), else the CPU; the nets are small enough for either."""
    return "cuda" if torch.cuda.is_available() else "cpu"


def fit(
    train_x: torch.Tensor,
    val_x: torch.Tensor,
    mcfg: ModelConfig,
    tcfg: TrainConfig,
    *,
    checkpoint: Path | None = None,
    progress: bool = True,
    device: str | None = None,
    init: dict[str, dict] | None = None,
) -> FitResult:
    """Trains on train_x (N, C, S, S); val_x are held-out known-good images. Stops after `tcfg.steps` steps, or
    at `tcfg.minutes` if that comes first (then the work, and so the bundle, depends on the machine's speed), or
    early once the held-out error has stopped falling (`stalled`, `tcfg.patience`).
    `init`: state dicts {"E", "G", "D"} the nets start from instead of a fresh init (`train --from`); the nets
    as they start are then a candidate too, so a continued run never ends with a worse held-out reconstruction
    than it started with. The returned nets are on the CPU in eval mode."""
    if tcfg.threads:
        torch.set_num_threads(tcfg.threads)
    fitter = Fitter(train_x, val_x, mcfg, tcfg, device=device or default_device(), init=init)
    if checkpoint is not None and checkpoint.exists():
        load_checkpoint(fitter, checkpoint)
    if init is not None and fitter.step == 0:
        fitter.remember(fitter.evaluate())  # its own fixed z: the training draws stay as in a fresh run
    budget = tcfg.minutes * 60 if tcfg.minutes else None
    bar = progress_bar(fitter.step / tcfg.steps, enabled=progress)
    start = time.monotonic()
    gan_steps = int(tcfg.steps * tcfg.gan_share) if tcfg.recipe == "two_stage" else tcfg.steps
    last: dict[str, float] = {}
    losses: dict[str, float] = {}
    stopped_early = False
    early_from = gan_steps if tcfg.recipe == "two_stage" else 0  # the encoder's own stage: its error can fall
    while fitter.step < tcfg.steps and not (budget and time.monotonic() - start > budget):
        losses = fitter.train_step(encoder_only=fitter.step >= gan_steps)
        if fitter.step % tcfg.eval_every == 0 or fitter.step == tcfg.steps:
            last = fitter.evaluate()
            fitter.remember(last)
            since = max(fitter.best[1], early_from)
            stopped_early = fitter.step < tcfg.steps and stalled(fitter.step, since, tcfg.patience)
        if fitter.step % 10 == 0 or fitter.step == tcfg.steps:
            by_time = (time.monotonic() - start) / budget if budget else 0.0
            show(bar, max(fitter.step / tcfg.steps, by_time), fitter.step, {**losses, **last})
        if checkpoint is not None and fitter.step % tcfg.checkpoint_every == 0:
            save_checkpoint(fitter, checkpoint)
        if stopped_early:
            break
    if not fitter.history or fitter.history[-1]["step"] != fitter.step:
        fitter.remember(fitter.evaluate())
    show(bar, 1.0, fitter.step, {**losses, **last})  # the step count, the time cap or early stopping ended it
    bar.close()
    _, chosen, state = fitter.best
    for key, net in (("E", fitter.E), ("G", fitter.G), ("D", fitter.D)):
        net.load_state_dict(state[key])
        net.cpu().eval()
    seconds = time.monotonic() - start
    return FitResult(fitter.E, fitter.G, fitter.D, fitter.step, seconds, chosen, fitter.history, stopped_early)


PROGRESS_UNITS = 1000  # the bar counts thousandths of the run: of the steps, or of the time cap when that ends it


def progress_bar(done: float, *, enabled: bool) -> tqdm:
    """A tqdm progress bar on stderr (fine when stderr is a file or a pipe) for a run that ends at its step count
    or its time cap, whichever comes first; `done` is the share already done (a resumed run)."""
    return tqdm(
        total=PROGRESS_UNITS,
        initial=int(done * PROGRESS_UNITS),
        disable=not enabled,
        file=sys.stderr,
        bar_format="{percentage:3.0f}%|{bar:24}| {elapsed}<{remaining}{postfix}",  # postfix: ", step N  G ..."
        mininterval=1.0,
    )


def show(bar: tqdm, done: float, step: int, values: dict[str, float]) -> None:
    """Moves `bar` to the share `done` (0 to 1) of the run and shows the step and `values` (losses, distances)."""
    bar.set_postfix_str("  ".join([f"step {step}", *(f"{k} {v:.4g}" for k, v in values.items())]), refresh=False)
    bar.update(max(0, min(PROGRESS_UNITS, int(done * PROGRESS_UNITS)) - bar.n))


def split_indices(n: int, share: float, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Deterministic split of n known-good images into fit / standardise / calibrate (the last two halve `share`)."""
    order = np.random.default_rng(seed).permutation(n)
    n_hold = max(4, int(round(n * share)))
    n_std = n_hold // 2
    return np.sort(order[n_hold:]), np.sort(order[:n_std]), np.sort(order[n_std:n_hold])
