"""Every model and training setting, with its default, in one visible place."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, fields

from knowngood.training.errors import BadConfig

TERM_FIELDS = ("pixel", "kappa", "perceptual", "memory", "adversarial")  # the terms' weights in ModelConfig
MEMORY_POOLS = (1, 2)  # the memory's patch strides (x 4 px) a model may use; the choice tries each (selection.py)
COMBINE_RULES = ("max", "mean")  # how the terms' maps make one heatmap (scoring.ScoringGraph.heat_from)
MAX_MEMORY_SIZE = 65536  # the most entries a memory may hold (the choice never asks for more)
# the default working size for large images (train.auto_size): images over SCALE_NOTE_RATIO x the default size
# are seen at most that much smaller, up to AUTO_SIZE_MAX px (4x the default's cost per image, not more); images
# still shrunk SCALE_NOTE_RATIO x or more get a warning (train.scale_note)
SCALE_NOTE_RATIO = 2.5
AUTO_SIZE_MAX = 256


@dataclass(frozen=True)
class ModelConfig:
    """Sizes of the networks and the score definition; stored in the bundle and enough to rebuild the model."""

    size: int = 128  # working width in px (the long side); images (or tiles) are resized to height x size
    height: int = 0  # working height in px; 0 = size (square). Set from the training images' aspect ratio
    tile: int = 0  # 0: the whole image is resized to the working size; else tiles of this many native px
    channels: int = 1  # 1 = grayscale, 3 = RGB; taken from the training set
    width: int = 16  # channels of the first conv block; doubles per block (8x in the critic)
    z_channels: int = 8  # latent channels; the latent is spatial, size / 8 on a side
    feature_layer: int = 2  # critic block whose output is f(x) for the feature residual
    pixel: float = 1.0  # weight of the image residual |x - G(E(x))| in the anomaly map (0 = term left out)
    kappa: float = 1.0  # weight of the critic-feature residual in the anomaly map
    perceptual: float = 1.0  # weight of the per-position pretrained-feature term (0 = left out); see perceptual.py
    memory: float = 1.0  # weight of the position-free term: distance to the nearest known-good patch (memory.py)
    adversarial: float = 1.0  # weight of the feature-space adversarial term (feature_critic.py)
    combine: str = "max"  # heatmap = the weighted standardised terms' "max" (strongest evidence) or "mean"
    memory_size: int = 4096  # patches kept in the memory by greedy coreset selection (fewer when fewer exist)
    # feature cells (of 4 px) each memory patch averages, pool x pool: 1 = a patch every 4 px; 2 = every 8 px, a
    # quarter of the positions to search, so 4 x the entries cost the same (memory.py; chosen per model)
    memory_pool: int = 1
    residual_shift: int = 1  # px the reconstruction may be off and still explain a pixel (see scoring.py)
    perceptual_shift: int = 1  # positions (of 4 px) a feature may move and still match known-good (fixture jitter)
    smooth_sigma: float = 2.0  # Gaussian smoothing of the anomaly map, in working-resolution pixels
    top_fraction: float = 0.003  # image score = mean of the top fraction of the heatmap (0.3 %: ~50 px at 128)

    def __post_init__(self) -> None:
        if self.size % 16 or not 32 <= self.size <= 1024:
            raise BadConfig(f"size must be a multiple of 16 from 32 to 1024, got {self.size}")
        for name, low, high in (("width", 1, 64), ("z_channels", 1, 64), ("feature_layer", 1, 4)):
            if not low <= getattr(self, name) <= high:
                raise BadConfig(f"{name} must be {low} to {high}, got {getattr(self, name)}")
        if not 0 < self.smooth_sigma <= 32:
            raise BadConfig(f"smooth_sigma must be in (0, 32], got {self.smooth_sigma}")
        if self.channels not in (1, 3):
            raise BadConfig(f"channels must be 1 or 3, got {self.channels}")
        for name in TERM_FIELDS:
            if not 0 <= getattr(self, name) <= 100:
                raise BadConfig(f"{name} must be from 0 to 100, got {getattr(self, name)}")
        if self.combine not in COMBINE_RULES:
            raise BadConfig(f"combine must be one of {', '.join(COMBINE_RULES)}, got {self.combine!r}")
        if not any(getattr(self, name) > 0 for name in TERM_FIELDS):
            raise BadConfig(f"at least one term ({', '.join(TERM_FIELDS)}) needs a positive weight")
        if self.height and (self.height % 16 or not 32 <= self.height <= 1024):
            raise BadConfig(f"height must be 0 or a multiple of 16 from 32 to 1024, got {self.height}")
        if self.tile and (self.height or not 32 <= self.tile <= 4096):
            raise BadConfig(f"tile must be 0 or 32 to 4096 px with a square working size, got {self.tile}")
        if not 1 <= self.memory_size <= MAX_MEMORY_SIZE:
            raise BadConfig(f"memory_size must be 1 to {MAX_MEMORY_SIZE}, got {self.memory_size}")
        if self.memory_pool not in MEMORY_POOLS:
            raise BadConfig(f"memory_pool must be one of {', '.join(map(str, MEMORY_POOLS))}, got {self.memory_pool}")
        for name in ("residual_shift", "perceptual_shift"):
            if not 0 <= getattr(self, name) <= 3:
                raise BadConfig(f"{name} must be 0 to 3, got {getattr(self, name)}")
        if not 0 < self.top_fraction <= 1:
            raise BadConfig(f"top_fraction must be in (0, 1], got {self.top_fraction}")

    @property
    def shape(self) -> tuple[int, int]:
        """(height, width) of the working resolution."""
        return (self.height or self.size, self.size)

    @property
    def pretrained(self) -> bool:
        """Whether a term uses the frozen pretrained features (per-position, memory, adversarial)."""
        return self.perceptual > 0 or self.memory > 0 or self.adversarial > 0


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
    # early stopping: fitting ends once the held-out reconstruction error has not fallen for this many steps, and
    # for at least as many as the best checkpoint took (0: use the whole budget); see fit.stalled
    patience: int = 1000
    critic_feature_steps: int = 1000  # steps of the feature-space critic (feature_critic.py), after the GAN
    checkpoint_every: int = 250  # steps between resumable checkpoints
    choose_terms: bool = True  # choose the terms' weights and the residual shift on synthetic defects (selection.py)
    residual_shifts: tuple[int, ...] = (0, 1)  # the residual shifts the choice may take
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
        if not self.residual_shifts or any(not 0 <= s <= 3 for s in self.residual_shifts):
            raise BadConfig(f"residual_shifts must be 0 to 3 px each, got {self.residual_shifts}")
        if self.steps < 1 or self.batch < 1:
            raise BadConfig("steps and batch must be at least 1")
        if self.patience < 0:
            raise BadConfig(f"patience must be 0 (off) or a number of steps, got {self.patience}")


def from_dict(cls, values: dict):
    """Builds a config dataclass, refusing unknown keys so a typo is an error, not a silent default."""
    names = {f.name for f in fields(cls)}
    unknown = sorted(set(values) - names)
    if unknown:
        raise BadConfig(f"unknown {cls.__name__} keys: {', '.join(unknown)}")
    kwargs = dict(values)
    for key in ("betas", "residual_shifts"):
        if key in kwargs:
            kwargs[key] = tuple(kwargs[key])
    return cls(**kwargs)


def to_dict(cfg) -> dict:
    return dataclasses.asdict(cfg)
