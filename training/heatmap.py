"""Heatmap overlays for people: the image with a red-to-yellow tint whose opacity rises with the heat.

Pure numpy and Pillow, no plotting library, so the service can draw one per request in a few milliseconds; and the
file names `inspect --heatmaps` gives the overlays.
Heat is in the anomaly score's unit: higher = less like the known-good parts.
"""

from __future__ import annotations

import io
import os
from collections import Counter
from pathlib import Path

import numpy as np
from PIL import Image

MAX_ALPHA = 0.65  # opacity at heat >= vmax; the part stays visible under the hottest spots


def overlay_rgb(image: np.ndarray, heatmap: np.ndarray, vmax: float) -> np.ndarray:
    """image (C, H, W) float in [0, 1] with C = 1 or 3, heatmap (H, W) -> (H, W, 3) uint8. Heat 0 leaves the
    image as it is; heat rising to `vmax` tints it from red to yellow with opacity up to MAX_ALPHA."""
    img = np.asarray(image, dtype=np.float32)
    heat = np.asarray(heatmap, dtype=np.float32)
    if img.ndim != 3 or img.shape[0] not in (1, 3):
        raise ValueError(f"image must be (C, H, W) with C = 1 or 3, got shape {img.shape}")
    if heat.shape != img.shape[1:]:
        raise ValueError(f"heatmap {heat.shape} must match the image's (H, W) {img.shape[1:]}")
    if not (np.isfinite(vmax) and vmax > 0):
        raise ValueError(f"vmax must be a positive finite number, got {vmax}")
    rgb = np.repeat(img, 3, axis=0) if img.shape[0] == 1 else img
    rgb = np.clip(np.nan_to_num(rgb), 0, 1).transpose(1, 2, 0)  # (H, W, 3)
    t = np.clip(np.nan_to_num(heat, nan=0.0, posinf=vmax) / np.float32(vmax), 0, 1)[..., None]  # (H, W, 1)
    colour = np.concatenate([np.ones_like(t), t, np.zeros_like(t)], axis=2)  # red (1, 0, 0) to yellow (1, 1, 0)
    alpha = MAX_ALPHA * t
    out = rgb * (1 - alpha) + colour * alpha
    return (out * 255 + 0.5).astype(np.uint8)


def overlay_png(image: np.ndarray, heatmap: np.ndarray, vmax: float) -> Image.Image:
    """The overlay of `overlay_rgb` as an RGB PIL image."""
    return Image.fromarray(overlay_rgb(image, heatmap, vmax))


def heatmap_png_bytes(image: np.ndarray, heatmap: np.ndarray, vmax: float) -> bytes:
    """The overlay encoded as PNG (fast compression: it is drawn per request)."""
    buf = io.BytesIO()
    overlay_png(image, heatmap, vmax).save(buf, format="PNG", compress_level=1)
    return buf.getvalue()


def heatmap_names(files: list[Path]) -> dict[Path, str]:
    """One file name (no suffix) per input image for `inspect --heatmaps`: the image's stem, or, where several
    images share a stem (the same numbering in two folders), its path below their common folder with `_` for
    `/` (pit/0001.png -> pit_0001); a `-2`, `-3` suffix settles anything still equal. A file given twice keeps
    one name."""
    unique = list(dict.fromkeys(p.resolve() for p in files))
    count = Counter(p.stem for p in unique)
    shared = [p.parent for p in unique if count[p.stem] > 1]
    root = Path(os.path.commonpath(shared)) if shared else None
    named: dict[Path, str] = {}
    used: set[str] = set()
    for p in unique:
        base = p.stem if count[p.stem] == 1 else "_".join(p.with_suffix("").relative_to(root).parts)
        name, k = base, 2
        while name in used:
            name, k = f"{base}-{k}", k + 1
        named[p] = name
        used.add(name)
    return {p: named[p.resolve()] for p in files}
