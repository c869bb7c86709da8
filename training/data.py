"""Images in, float tensors out: decoding, validation, colour mode, resize policy and folder walking.

Every image becomes float32 in [0, 1], shape (C, H, W) at its own resolution, C = 1 (grayscale) or 3 (RGB).
The model's working size and colour mode come from the training set and are applied by `to_model_input`.
"""

from __future__ import annotations

import hashlib
import io
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
from PIL import Image, ImageSequence

from training.errors import BadDataset, BadImage, ImageTooLarge

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff")
MAX_PIXELS = 64_000_000  # decompression-bomb guard: 8000 x 8000
MIN_SIDE = 16  # smaller than this cannot show a part


def decode_image(data: bytes, *, name: str, max_pixels: int = MAX_PIXELS, min_side: int = MIN_SIDE) -> np.ndarray:
    """Decodes PNG/JPEG/BMP/TIFF bytes (8 or 16 bit, gray, RGB, RGBA, palette, CMYK) to (C, H, W) float32 in [0, 1].

    The pixel count is checked from the header before any pixel is decoded; multi-frame images are refused
    because it would be a guess which frame shows the part.
    """
    if not data:
        raise BadImage(f"{name}: empty file")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            img = Image.open(io.BytesIO(data))
            _check_header(img, name=name, max_pixels=max_pixels, min_side=min_side)
            img.load()
    except (ImageTooLarge, BadImage):
        raise
    except (Image.DecompressionBombError, Image.DecompressionBombWarning) as exc:
        raise ImageTooLarge(f"{name}: too many pixels, over the limit of {max_pixels} ({exc})") from None
    except Exception as exc:  # PIL raises many types for broken files; all mean the same to a user
        return _decode_fallback(data, name=name, reason=exc)
    return _to_array(img, name=name)


def _check_header(img: Image.Image, *, name: str, max_pixels: int, min_side: int) -> None:
    w, h = img.size
    if w * h > max_pixels:
        raise ImageTooLarge(f"{name}: {w} x {h} pixels is over the limit of {max_pixels} pixels")
    if min(w, h) < min_side:
        raise BadImage(f"{name}: {w} x {h} pixels is too small (each side must be at least {min_side})")
    if getattr(img, "n_frames", 1) > 1 and img.format in ("GIF", "PNG", "WEBP"):
        raise BadImage(f"{name}: animated image with {img.n_frames} frames; send a single still image")
    if img.format not in ("PNG", "JPEG", "BMP", "TIFF", "GIF", "MPO"):
        raise BadImage(f"{name}: image type {img.format} is not accepted (PNG, JPEG, BMP, TIFF)")


def _decode_fallback(data: bytes, *, name: str, reason: Exception) -> np.ndarray:
    """16-bit RGB TIFF (common on industrial cameras) is beyond PIL; tifffile reads it."""
    if data[:4] in (b"II*\x00", b"MM\x00*"):
        try:
            import tifffile

            arr = tifffile.imread(io.BytesIO(data))
            return _normalise(np.asarray(arr), name=name)
        except Exception:
            pass
    kind = "truncated or corrupt" if data[:2] in (b"\xff\xd8", b"\x89P", b"BM", b"II", b"MM", b"GI") else "unknown type"
    detail = str(reason).split(" <", 1)[0]  # PIL appends an object repr that means nothing to a user
    raise BadImage(f"{name}: not a readable image ({kind}: {detail})") from None


def _to_array(img: Image.Image, *, name: str) -> np.ndarray:
    img = next(iter(ImageSequence.Iterator(img)))
    mode = img.mode
    if mode in ("I;16", "I;16B", "I;16L", "I", "F"):
        arr = np.asarray(img)
        return _normalise(arr, name=name, bits=16 if mode.startswith("I;16") or arr.max(initial=0) > 255 else 8)
    if mode in ("1", "L", "LA"):
        img = img.convert("L")
    elif mode not in ("RGB",):
        img = img.convert("RGB")  # palette, RGBA, CMYK, YCbCr: alpha is dropped, CMYK converted
    return _normalise(np.asarray(img), name=name)


def _normalise(arr: np.ndarray, *, name: str, bits: int | None = None) -> np.ndarray:
    if arr.ndim == 2:
        arr = arr[None]
    elif arr.ndim == 3 and arr.shape[-1] in (1, 3, 4):
        arr = np.moveaxis(arr[..., :3], -1, 0)
    else:
        raise BadImage(f"{name}: unsupported pixel layout {arr.shape}")
    if arr.dtype == np.uint8:
        scale = 255.0
    elif arr.dtype == np.uint16 or bits == 16:
        scale = 65535.0
    elif np.issubdtype(arr.dtype, np.floating):
        scale = 1.0
    else:
        scale = float(np.iinfo(arr.dtype).max) if arr.max(initial=0) > 255 else 255.0
    out = np.clip(arr.astype(np.float32) / scale, 0.0, 1.0)
    if out.shape[0] == 3 and np.array_equal(out[0], out[1]) and np.array_equal(out[1], out[2]):
        out = out[:1]  # an RGB file holding a gray picture is gray
    return np.ascontiguousarray(out)


def read_image(path: Path, **limits) -> np.ndarray:
    """Reads one image file; the error names the file."""
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise BadImage(f"{path}: cannot read ({exc.strerror})") from None
    return decode_image(data, name=str(path), **limits)


def to_channels(img: torch.Tensor, channels: int) -> torch.Tensor:
    """(B, C, H, W) to the model's colour mode: gray is replicated, RGB goes to ITU-R BT.601 luma."""
    c = img.shape[1]
    if c == channels:
        return img
    if channels == 3:
        return img.expand(-1, 3, -1, -1)
    weights = torch.tensor([0.299, 0.587, 0.114], dtype=img.dtype).view(1, 3, 1, 1)
    return (img * weights).sum(1, keepdim=True)


def to_model_input(images: list[np.ndarray], *, size: int, channels: int) -> torch.Tensor:
    """Native-resolution images to one (B, channels, size, size) batch: stretch-resize with antialiasing.

    Stretching (not cropping) keeps every pixel of the part visible to the model; the heatmap is resized back
    to each image's own resolution afterwards, so nothing is lost for the user.
    """
    out = []
    for arr in images:
        t = torch.from_numpy(arr)[None]
        if t.shape[-2:] != (size, size):
            t = F.interpolate(t, size=(size, size), mode="bilinear", antialias=True, align_corners=False)
        out.append(to_channels(t, channels))
    return torch.cat(out).clamp_(0, 1).contiguous()


def list_images(folder: Path) -> list[Path]:
    """Image files under a folder, recursively, in a stable order."""
    folder = Path(folder)
    if not folder.is_dir():
        raise BadDataset(f"{folder}: not a folder")
    return sorted(p for p in folder.rglob("*") if p.suffix.lower() in IMAGE_SUFFIXES and p.is_file())


@dataclass
class ImageSet:
    """Images of one folder at native resolution, with what was skipped and why."""

    paths: list[Path]
    images: list[np.ndarray]
    skipped: list[tuple[Path, str]] = field(default_factory=list)

    @property
    def channels(self) -> int:
        """3 if any image has colour, else 1: the colour mode a model trained on this set uses."""
        return 3 if any(im.shape[0] == 3 for im in self.images) else 1

    def fingerprint(self) -> str:
        return fingerprint(self.paths)


def fingerprint(paths: list[Path]) -> str:
    """SHA-256 over the sorted file names and contents: identifies the exact image set in a bundle."""
    h = hashlib.sha256()
    for p in sorted(paths, key=lambda q: q.name):
        h.update(p.name.encode())
        h.update(hashlib.sha256(p.read_bytes()).digest())
    return h.hexdigest()


def load_folder(folder: Path, *, skip_bad: bool = False, min_count: int = 1) -> ImageSet:
    """Reads every image under `folder`. An unreadable file is an error naming it, or skipped and reported."""
    paths, images, skipped = [], [], []
    for path in list_images(folder):
        try:
            images.append(read_image(path))
            paths.append(path)
        except BadImage as exc:
            if not skip_bad:
                raise
            skipped.append((path, str(exc)))
    if len(images) < min_count:
        raise BadDataset(f"{folder}: found {len(images)} readable images, need at least {min_count}")
    return ImageSet(paths=paths, images=images, skipped=skipped)
