"""Every model and training setting, with its default, in one visible place."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, fields

from training.errors import BadConfig


@dataclass(frozen=True)
class ModelConfig:
    """Sizes of the networks and the score definition; stored in the bundle and enough to rebuild the model."""

    size: int = 128  # working resolution (square) the images are resized to
    channels: int = 1  # 1 = grayscale, 3 = RGB; taken from the training set
    width: int = 16  # channels of the first conv block; doubles per block (8x in the critic)
    z_channels: int = 8  # latent channels; the latent is spatial, size / 8 on a side
    feature_layer: int = 2  # critic block whose output is f(x) for the feature residual
    kappa: float = 1.0  # weight of the critic-feature residual in the anomaly map
    perceptual: float = 1.0  # weight of the pretrained perceptual term (0 = GAN terms only); see perceptual.py
    residual_shift: int = 1  # px the reconstruction may be off and still explain a pixel (see scoring.py)
    perceptual_shift: int = 1  # positions (of 4 px) a feature may move and still match known-good (fixture jitter)
    smooth_sigma: float = 2.0  # Gaussian smoothing of the anomaly map, in working-resolution pixels
    top_fraction: float = 0.003  # image score = mean of the top fraction of the heatmap (0.3 %: ~50 px at 128)

    def __post_init__(self) -> None:
        if self.size % 16 or self.size < 32:
            raise BadConfig(f"size must be a multiple of 16 and at least 32, got {self.size}")
        if self.channels not in (1, 3):
            raise BadConfig(f"channels must be 1 or 3, got {self.channels}")
        if self.kappa < 0 or self.perceptual < 0:
            raise BadConfig(f"kappa and perceptual must be non-negative, got {self.kappa}, {self.perceptual}")
        for name in ("residual_shift", "perceptual_shift"):
            if not 0 <= getattr(self, name) <= 3:
                raise BadConfig(f"{name} must be 0 to 3, got {getattr(self, name)}")
        if not 0 < self.top_fraction <= 1:
            raise BadConfig(f"top_fraction must be in (0, 1], got {self.top_fraction}")

    @property
    def latent_side(self) -> int:
        return self.size // 8


@dataclass(frozen=True)
class TrainConfig:
    """How the networks are fitted. `steps` fixes the work (reproducible); `minutes` caps the wall time."""

    steps: int = 3000
    minutes: float = 10.0
    recipe: str = "joint"  # "joint" (adversarial auto-encoder) or "two_stage" (f-AnoGAN: GAN, then encoder)
    gan_share: float = 0.6  # two_stage only: share of the steps spent on the GAN before the encoder
    patch: int = 64  # training crop side in px (0 = whole image); the nets are fully convolutional
    batch: int = 32
    lr: float = 2e-4
    betas: tuple[float, float] = (0.5, 0.9)
    critic_steps: int = 1  # critic updates per generator/encoder update (1: faster on CPU, see README)
    gp_lambda: float = 10.0  # WGAN-GP gradient penalty weight (Gulrajani et al. 2017)
    recon_weight: float = 1000.0  # izi_f weight; per-pixel MSE gradients are ~1e-3 of the critic's, see README
    holdout_share: float = 0.25  # known-good images kept out of fitting for standardisation and threshold
    target_false_reject: float = 0.01  # conformal threshold target at train time
    eval_every: int = 250  # steps between Fréchet-distance evaluations / checkpoint choice
    checkpoint_every: int = 250  # steps between resumable checkpoints
    augment: bool = True  # small shifts, rotations and brightness changes (process variation, not defects)
    seed: int = 0
    threads: int = 0  # 0 = torch default

    def __post_init__(self) -> None:
        if self.recipe not in ("joint", "two_stage"):
            raise BadConfig(f"recipe must be 'joint' or 'two_stage', got {self.recipe!r}")
        if self.patch and (self.patch % 16 or self.patch < 32):
            raise BadConfig(f"patch must be 0 or a multiple of 16 of at least 32, got {self.patch}")
        if not 0 < self.holdout_share < 1:
            raise BadConfig(f"holdout_share must be in (0, 1), got {self.holdout_share}")
        if self.steps < 1 or self.batch < 1:
            raise BadConfig("steps and batch must be at least 1")


def from_dict(cls, values: dict):
    """Builds a config dataclass, refusing unknown keys so a typo is an error, not a silent default."""
    names = {f.name for f in fields(cls)}
    unknown = sorted(set(values) - names)
    if unknown:
        raise BadConfig(f"unknown {cls.__name__} keys: {', '.join(unknown)}")
    kwargs = dict(values)
    if "betas" in kwargs:
        kwargs["betas"] = tuple(kwargs["betas"])
    return cls(**kwargs)


def to_dict(cfg) -> dict:
    return dataclasses.asdict(cfg)
