"""A trained model ready to score: the scoring graph plus its threshold and manifest. Built by `bundle.load`."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
import torch
from knowngood.training.config import ModelConfig
from knowngood.training.data import to_model_input
from knowngood.training.scoring import ScoringGraph, images_per_pass, resize_maps

INSPECTION_PASS_BYTES = 64 * 2**20  # the memory term's distance matrix in one forward pass of inspection


@dataclass(frozen=True)
class Prepared:
    """One image as the scoring graph takes it."""

    x: torch.Tensor  # (n, C, S, S): the whole image at the working shape (n = 1), or its n tiles
    boxes: tuple[tuple[int, int], ...] | None  # (top, left) of each tile in the image; None: whole image
    height: int  # the image's own size
    width: int


@dataclass(frozen=True)
class Inspection:
    """One image's result. score: higher = less like known-good; verdict 'flag' when score > threshold."""

    score: float
    threshold: float
    verdict: str
    heatmap: np.ndarray  # (H, W) float32 at the input image's own resolution, same unit as the score


@dataclass
class Detector:
    cfg: ModelConfig
    graph: ScoringGraph
    threshold: float
    manifest: dict = field(default_factory=dict)
    sha256: str = ""  # of the bundle file this was loaded from
    runner: Callable | None = field(default=None, repr=False)  # e.g. OnnxRunner; None = eager PyTorch

    def use_onnx(self, threads: int = 0) -> Detector:
        """Switches scoring to ONNX Runtime (faster on CPU); the same graph and weights, so the same scores."""
        from knowngood.training.runtime import OnnxRunner

        self.runner = OnnxRunner(self.graph, threads=threads)
        return self

    @property
    def model_id(self) -> str:
        return self.manifest.get("model_id", "unsaved")

    @property
    def revision(self) -> str:
        """The threshold's identity: 8 hex digits of the sha256 of the manifest's `threshold` section (value, how
        and when it was set, the rates it achieved). `tune` or a threshold change gives a new revision while the
        model id (the weights) stays; the two together say which decision rule made a verdict."""
        section = json.dumps(self.manifest.get("threshold", {}), sort_keys=True, default=str)
        return hashlib.sha256(section.encode()).hexdigest()[:8]

    def prepare(self, images: list[np.ndarray]) -> torch.Tensor:
        """(C, H, W) float arrays at any size -> one (B, C, h, w) batch at the working shape and colour mode
        (whole-image models; a tiled model's tiles come from `prepare_one`)."""
        return to_model_input(images, size=self.cfg.shape, channels=self.cfg.channels)

    def score_batch(self, x: torch.Tensor, batch: int | None = None) -> tuple[np.ndarray, torch.Tensor]:
        """x (N, C, h, w) -> anomaly scores (N,) float64 (higher = less like known-good) and heatmaps (N, h, w)."""
        scores, heats, _ = self.score_and_embed(x, batch)
        return scores, heats

    def batch_size(self) -> int:
        """Images per forward pass: 32, fewer where the memory term's distance matrix (positions x entries)
        would pass about 64 MB."""
        return images_per_pass(self.cfg, most=32, budget=INSPECTION_PASS_BYTES)

    @torch.inference_mode()
    def score_and_embed(self, x: torch.Tensor, batch: int | None = None) -> tuple[np.ndarray, torch.Tensor, np.ndarray]:
        """`score_batch` plus each image's `embed` features (N, F) float64, from the same pass."""
        self.graph.eval()
        run = self.runner or self.graph
        batch = batch or self.batch_size()
        outputs = [run(x[i : i + batch]) for i in range(0, len(x), batch)]
        scores, heats, embeddings = (torch.cat(parts) for parts in zip(*outputs))
        return scores.double().numpy(), heats, embeddings.double().numpy()

    def score_images(self, images: Sequence[np.ndarray]) -> tuple[np.ndarray, list[np.ndarray], np.ndarray]:
        """Native-resolution images (C, H, W) -> scores (N,) float64 (higher = less like known-good), heatmaps
        as float32 (H, W) at each image's own resolution, and the drift embeddings (N, F). A tiled model scores
        every tile at the camera's own scale: the heatmap is stitched back, the image score is its worst tile's."""
        if not images:
            return np.zeros(0), [], np.zeros((0, 0))
        if not self.cfg.tile:
            # one image at a time to the working shape (the same batch as `prepare(images)`): `images` may decode
            # each on demand (`folders.ImageFiles`), and then only one is held at full resolution
            sizes, inputs = [], []
            for im in images:
                sizes.append(im.shape[-2:])
                inputs.append(self.prepare([im]))
            scores, heats, emb = self.score_and_embed(torch.cat(inputs))
            return scores, resize_maps(heats, sizes), emb
        results = [self._score_tiled(im) for im in images]
        scores = np.array([r[0] for r in results])
        return scores, [r[1] for r in results], np.stack([r[2] for r in results])

    def _score_tiled(self, image: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        prepared = self.prepare_one(image)
        scores, heats, emb = self.score_and_embed(prepared.x)
        score, heat, embedding = self.finish(prepared, scores, heats, emb)
        return score, heat.numpy(), embedding

    def prepare_one(self, image: np.ndarray) -> Prepared:
        """One native-resolution image (C, H, W) -> what the scoring graph takes for it: the whole image at the
        working shape, or (tiled model) its tiles."""
        h, w = image.shape[-2:]
        if not self.cfg.tile:
            return Prepared(self.prepare([image]), None, h, w)
        boxes = tile_boxes((h, w), self.cfg.tile)
        return Prepared(self.prepare_tiles(image, boxes), tuple(boxes), h, w)

    def finish(
        self, prepared: Prepared, scores: np.ndarray, heats: torch.Tensor, emb: np.ndarray
    ) -> tuple[float, torch.Tensor, np.ndarray]:
        """The graph's outputs for one `Prepared` image -> (score, heatmap, embedding): the heatmap at the working
        resolution for a whole-image model; a tiled model's stitched at the image's own resolution, its score
        that of the worst tile, its embedding the tiles' mean."""
        if prepared.boxes is None:
            return float(scores[0]), heats[0], emb[0]
        t = self.cfg.tile
        maps = resize_maps(heats, [(t, t)] * len(prepared.boxes))
        h, w = prepared.height, prepared.width
        canvas = np.zeros((max(h, t), max(w, t)), dtype=np.float32)
        for (y, x0), m in zip(prepared.boxes, maps):
            np.maximum(canvas[y : y + t, x0 : x0 + t], m, out=canvas[y : y + t, x0 : x0 + t])
        return float(scores.max()), torch.from_numpy(np.ascontiguousarray(canvas[:h, :w])), emb.mean(0)

    def prepare_tiles(self, image: np.ndarray, boxes: list[tuple[int, int]]) -> torch.Tensor:
        """(C, H, W) -> (n, C, S, S): the tiles at `boxes` (top, left), each `cfg.tile` native px, at the working
        size; an image smaller than a tile is padded by reflection."""
        t = self.cfg.tile
        img = pad_to(image, t)
        return to_model_input(
            [img[:, y : y + t, x : x + t] for y, x in boxes], size=self.cfg.shape, channels=self.cfg.channels
        )

    def inspect(self, images: Sequence[np.ndarray]) -> list[Inspection]:
        """Scores native-resolution images (a list, or `folders.ImageFiles`: decoded one at a time); heatmaps come
        back at each image's own size."""
        if not images:
            return []
        scores, maps, _ = self.score_images(images)
        t = self.threshold
        return [
            Inspection(score=float(s), threshold=t, verdict=verdict(float(s), t), heatmap=m)
            for s, m in zip(scores, maps)
        ]

    def embed_images(self, images: list[np.ndarray]) -> np.ndarray:
        """(N, F) drift embeddings of native-resolution images, as `score_images` gives them (a tiled model: the
        mean over an image's tiles)."""
        if not self.cfg.tile:
            return self.embed(images)
        return np.stack(
            [self.embed(self.prepare_tiles(im, tile_boxes(im.shape[-2:], self.cfg.tile))).mean(0) for im in images]
        )

    @torch.inference_mode()
    def embed(self, images: list[np.ndarray] | torch.Tensor, batch: int = 64) -> np.ndarray:
        """(N, F) pooled critic features: the space Fréchet distances (drift) are measured in."""
        x = images if isinstance(images, torch.Tensor) else self.prepare(images)
        self.graph.eval()
        parts = [self.graph.critic.pooled_features(x[i : i + batch]) for i in range(0, len(x), batch)]
        return torch.cat(parts).double().numpy()


def verdict(score: float, threshold: float) -> str:
    """The one rule: 'flag' when score > threshold, else 'pass' (higher score = less like known-good)."""
    return "flag" if score > threshold else "pass"


TILE_OVERLAP = 8  # tiles overlap by 1/8 of their side, so a defect on a tile's edge is whole in its neighbour


def tile_boxes(shape: tuple[int, int], tile: int) -> list[tuple[int, int]]:
    """(top, left) of the tiles covering an image of `shape` (H, W): a grid with stride 7/8 of the tile, the
    last row and column flush with the image's edge."""

    def starts(n: int) -> list[int]:
        if n <= tile:
            return [0]
        stride = tile - tile // TILE_OVERLAP
        out = list(range(0, n - tile, stride))
        return out + [n - tile]

    return [(y, x) for y in starts(shape[0]) for x in starts(shape[1])]


def pad_to(image: np.ndarray, tile: int) -> np.ndarray:
    """(C, H, W) padded by reflection (edge-repeat where too small to reflect) to at least tile x tile."""
    h, w = image.shape[-2:]
    if h >= tile and w >= tile:
        return image
    pad = ((0, 0), (0, max(0, tile - h)), (0, max(0, tile - w)))
    mode = "reflect" if h > tile - h and w > tile - w else "edge"
    return np.pad(image, pad, mode=mode)
