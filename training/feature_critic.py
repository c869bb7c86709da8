"""The feature-space adversarial term: a critic on the frozen pretrained patch features, trained against anomalous
features made by a generator of perturbations (SimpleNet, Liu et al., CVPR 2023).

Known-good patch features pass a small adaptor A; the generator makes anomalous ones by adding Gaussian noise to
them (SimpleNet's anomalous-feature generator); the critic D (two 1x1 layers) learns to score the known-good ones
above +th and the generated ones below -th (SimpleNet's truncated L1 loss). Where D's boundary lies is learned,
not a fixed radius, so it complements the memory's nearest-neighbour distance; per patch it costs a few
thousand multiply-adds, so it adds little to inspection time.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from knowngood.training.memory import local_average, patch_features
from torch import nn

NOISE = 0.2  # generator's noise, as a share of the adapted features' mean per-channel std
MARGIN = 0.5  # th of the truncated L1 loss
HIDDEN = 128


class FeatureCritic(nn.Module):
    """(B, F, h, w) pretrained features -> (B, 1, h, w) anomaly evidence: -D(A(local average of the features)),
    higher = less like known-good."""

    def __init__(self, channels: int):
        super().__init__()
        self.adaptor = nn.Conv2d(channels, channels, 1)  # (B, F, h, w)
        self.critic = nn.Sequential(
            nn.Conv2d(channels, HIDDEN, 1),  # (B, 128, h, w)
            nn.LeakyReLU(0.2),
            nn.Conv2d(HIDDEN, 1, 1),  # (B, 1, h, w)
        )

    def forward(self, phi: torch.Tensor) -> torch.Tensor:
        return -self.critic(self.adaptor(local_average(phi)))


def _critic(net: FeatureCritic, a: torch.Tensor) -> torch.Tensor:
    """D on (n, F) adapted patch features -> (n, 1), as the 1x1 convolutions compute it on maps."""
    first, act, last = net.critic
    h = act(F.linear(a, first.weight.flatten(1), first.bias))
    return F.linear(h, last.weight.flatten(1), last.bias)


def fit_feature_critic(
    phi: torch.Tensor,
    *,
    steps: int = 1000,
    batch: int = 512,
    seed: int = 0,
    lr: float = 2e-4,
    init: dict[str, torch.Tensor] | None = None,
) -> FeatureCritic:
    """Trains a FeatureCritic on known-good pretrained features phi (N, F, h, w), from the weights `init` when
    given (`train --from`) instead of a fresh init; returns it in eval mode."""
    gen = torch.Generator().manual_seed(seed)
    torch.manual_seed(seed)
    net = FeatureCritic(phi.shape[1])
    if init is not None:
        net.load_state_dict(init)
    patches = patch_features(phi)  # (N h w, F)
    opt = torch.optim.Adam(
        [{"params": net.adaptor.parameters(), "lr": lr / 2}, {"params": net.critic.parameters(), "lr": lr}]
    )
    net.train()
    c = phi.shape[1]
    for _ in range(steps):
        real = patches[torch.randint(len(patches), (batch,), generator=gen)]  # (batch, F)
        # the 1x1 convolutions as matrix products on a batch of patches: the same weights, far less overhead
        a = F.linear(real, net.adaptor.weight.view(c, c), net.adaptor.bias)
        # generator: anomalous features = known-good features + Gaussian noise scaled to their spread
        fake = a + torch.randn(a.shape, generator=gen) * NOISE * a.detach().std(0).mean()
        # critic: known-good above +MARGIN, generated below -MARGIN (truncated L1)
        loss = torch.relu(MARGIN - _critic(net, a)).mean() + torch.relu(MARGIN + _critic(net, fake)).mean()
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
    net.requires_grad_(False)
    return net.eval()
