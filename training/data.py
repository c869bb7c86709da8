"""Images in, float tensors out: decoding, validation, colour mode and resize policy (folders: `folders.py`).

Every image becomes float32 in [0, 1], shape (C, H, W) at its own resolution, C = 1 (grayscale) or 3 (RGB).
The model's working size and colour mode come from the training set and are applied by `to_model_input`.
"""

from __future__ import annotations

import io
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
from knowngood.training.errors import BadImage, ImageTooLarge
from PIL import Image

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff")
MAX_PIXELS = 64_000_000  # decompression-bomb guard: 8000 x 8000
MIN_SIDE = 16  # smaller than this cannot show a part; for a given model see `min_side_for`
BYTES_PER_PIXEL = 8  # decoded-size bound: max_pixels x this many bytes (a gray image at the pixel limit as float32
# takes 4, a colour one 12: colour images may have two thirds of the pixel limit, 16-bit RGBA ones the same)
_GRAY_MODES = ("1", "L", "LA", "I;16", "I;16B", "I;16L", "I", "F")
_ORIENTATION = 0x0112  # EXIF / TIFF tag: how the camera was held; the decoded image is turned upright


@dataclass(frozen=True)
class _Header:
    """What a decoder will allocate, read from the file's header before any pixel is decoded."""

    width: int
    height: int
    frames: int
    stored_bytes: int  # the decoder's own buffer
    channels: int  # 1 or 3: the float32 result's channels


def decode_image(data: bytes, *, name: str, max_pixels: int = MAX_PIXELS, min_side: int = MIN_SIDE) -> np.ndarray:
    """Decodes PNG/JPEG/BMP/TIFF bytes (8 or 16 bit, gray, RGB, RGBA, palette, CMYK) to (C, H, W) float32 in [0, 1],
    turned upright by its EXIF / TIFF orientation.

    Every decoder's header is checked before any pixel is decoded, with the same limits: at most `max_pixels`
    pixels, at least `min_side` on each side, at most `max_pixels * BYTES_PER_PIXEL` bytes decoded (ImageTooLarge,
    413), and a single frame: multi-frame or multi-page files are refused because it would be a guess which frame
    shows the part.
    """
    if not data:
        raise BadImage(f"{name}: empty file")
    limits = dict(name=name, max_pixels=max_pixels, min_side=min_side)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            img = Image.open(io.BytesIO(data))
            _check_format(img, name=name)
            _check_header(_pil_header(img), **limits)
            img.load()
    except (ImageTooLarge, BadImage):
        raise
    except (Image.DecompressionBombError, Image.DecompressionBombWarning) as exc:
        raise ImageTooLarge(f"{name}: too many pixels, over the limit of {max_pixels} ({exc})") from None
    except Exception as exc:  # PIL raises many types for broken files; all mean the same to a user
        return _decode_fallback(data, reason=exc, **limits)
    return _to_array(img, name=name)


def _check_format(img: Image.Image, *, name: str) -> None:
    if img.format not in ("PNG", "JPEG", "BMP", "TIFF", "GIF", "MPO"):
        raise BadImage(f"{name}: image type {img.format} is not accepted (PNG, JPEG, BMP, TIFF)")


def _pil_header(img: Image.Image) -> _Header:
    w, h = img.size
    bands = len(img.getbands())
    per_pixel = {"I;16": 2, "I;16B": 2, "I;16L": 2, "I": 4, "F": 4}.get(img.mode, 4 if bands > 1 else 1)
    # an MPO (multi-picture JPEG) defines its first frame as the primary image: that one is read, not guessed
    frames = 1 if img.format == "MPO" else getattr(img, "n_frames", 1)
    return _Header(w, h, frames, w * h * per_pixel, 1 if img.mode in _GRAY_MODES else 3)


def _check_header(head: _Header, *, name: str, max_pixels: int, min_side: int) -> None:
    """The one set of limits, for every decoder."""
    w, h = head.width, head.height
    if head.frames != 1:
        raise BadImage(f"{name}: multi-frame (animated or multi-page) image with {head.frames} frames; send one still")
    if w * h > max_pixels:
        raise ImageTooLarge(f"{name}: {w} x {h} pixels is over the limit of {max_pixels} pixels")
    if min(w, h) < min_side:
        raise BadImage(f"{name}: {w} x {h} pixels is too small (each side must be at least {min_side})")
    decoded, limit = max(head.stored_bytes, w * h * head.channels * 4), max_pixels * BYTES_PER_PIXEL
    if decoded > limit:
        raise ImageTooLarge(
            f"{name}: {w} x {h} pixels decode to {decoded} bytes, over the limit of {limit} bytes "
            f"({BYTES_PER_PIXEL} bytes x the pixel limit)"
        )


def _decode_fallback(data: bytes, *, name: str, reason: Exception, max_pixels: int, min_side: int) -> np.ndarray:
    """16-bit RGB TIFF (common on industrial cameras), float or multi-sample TIFF are beyond PIL; tifffile reads
    them, after the same header checks."""
    if data[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        import tifffile

        try:
            with tifffile.TiffFile(io.BytesIO(data)) as tif:
                page = tif.pages.first
                frames = len(tif.pages)
                shape, dtype, planar = tuple(page.shape), np.dtype(page.dtype), page.planarconfig
                orientation = int(page.tags.valueof(_ORIENTATION, 1) or 1)
                if len(shape) == 3 and planar == 2:  # separate planes: (S, H, W)
                    shape = (*shape[1:], shape[0])
                if len(shape) not in (2, 3) or (len(shape) == 3 and shape[2] not in (1, 3, 4)):
                    raise BadImage(f"{name}: unsupported pixel layout {tuple(page.shape)}")
                h, w = shape[:2]
                channels = 1 if len(shape) == 2 or shape[2] == 1 else 3
                _check_header(
                    _Header(w, h, frames, int(np.prod(shape)) * dtype.itemsize, channels),
                    name=name,
                    max_pixels=max_pixels,
                    min_side=min_side,
                )
                arr = page.asarray()
            if arr.ndim == 3 and planar == 2:
                arr = np.moveaxis(arr, 0, -1)
            planes = [arr] if arr.ndim == 2 else [arr[..., c] for c in range(min(arr.shape[-1], 3))]
            return _normalise([_orient(p, orientation) for p in planes], name=name)
        except (BadImage, ImageTooLarge):
            raise
        except Exception:
            pass
    kind = "truncated or corrupt" if data[:2] in (b"\xff\xd8", b"\x89P", b"BM", b"II", b"MM", b"GI") else "unknown type"
    detail = str(reason).split(" <", 1)[0]  # PIL appends an object repr that means nothing to a user
    raise BadImage(f"{name}: not a readable image ({kind}: {detail})") from None


def _orient(arr: np.ndarray, orientation: int) -> np.ndarray:
    """(H, W[, C]) turned upright by an EXIF / TIFF orientation (1-8), as views: no copy until `_normalise`."""
    if orientation in (5, 6, 7, 8):
        arr = arr.swapaxes(0, 1)  # transpose; 6 and 8 are then mirrored into 90-degree turns
    if orientation in (2, 3, 6, 7):
        arr = arr[:, ::-1]
    if orientation in (3, 4, 7, 8):
        arr = arr[::-1]
    return arr


def _orientation(img: Image.Image) -> int:
    return img.getexif().get(_ORIENTATION, 1) if img.format in ("JPEG", "MPO", "TIFF", "PNG") else 1


def _to_array(img: Image.Image, *, name: str) -> np.ndarray:
    orientation = _orientation(img)
    mode = img.mode
    bits = None
    if mode in ("I;16", "I;16B", "I;16L", "I", "F"):
        planes = [np.asarray(img)]
        bits = 16 if mode.startswith("I;16") or planes[0].max(initial=0) > 255 else 8
    elif mode in ("1", "L", "LA"):
        planes = [np.asarray(img.convert("L") if mode != "L" else img)]
    else:
        rgb = img if mode == "RGB" else img.convert("RGB")  # palette, RGBA, CMYK, YCbCr: alpha dropped
        planes = [np.asarray(rgb.getchannel(band)) for band in "RGB"]  # a plane at a time: no full-size copy
        rgb.close()
    img.close()  # the decoder's buffer goes before the float32 one is allocated
    return _normalise([_orient(p, orientation) for p in planes], name=name, bits=bits)


def _normalise(planes: list[np.ndarray], *, name: str, bits: int | None = None) -> np.ndarray:
    """1 or 3 planes (H, W) of samples to (C, H, W) float32 in [0, 1]: one float32 allocation, scaled in place."""
    if len(planes) not in (1, 3) or any(p.ndim != 2 or p.shape != planes[0].shape for p in planes):
        raise BadImage(f"{name}: unsupported pixel layout {[p.shape for p in planes]}")
    if len(planes) == 3 and _same_planes(planes):
        planes = planes[:1]  # an RGB file holding a gray picture is gray
    first = planes[0]
    if first.dtype == np.uint8:
        scale = 255.0
    elif first.dtype == np.uint16 or bits == 16:
        scale = 65535.0
    elif np.issubdtype(first.dtype, np.floating):
        scale = 1.0
    else:
        scale = float(np.iinfo(first.dtype).max) if max(p.max(initial=0) for p in planes) > 255 else 255.0
    out = np.empty((len(planes), *first.shape), np.float32)
    for c, plane in enumerate(planes):
        out[c] = plane
    if scale != 1.0:
        out /= np.float32(scale)
    if first.dtype in (np.uint8, np.uint16) and scale == float(np.iinfo(first.dtype).max):
        return out  # already in [0, 1]: the two clamps below are two more passes over a multi-megapixel image
    np.fmax(out, 0.0, out=out)  # NaN -> 0 as well, in place (np.nan_to_num would allocate full-size masks)
    return np.minimum(out, 1.0, out=out)


def _same_planes(planes: list[np.ndarray]) -> bool:
    """Row by row, so the comparison never holds a full-size temporary."""
    a, b, c = planes
    return all(np.array_equal(a[i], b[i]) and np.array_equal(b[i], c[i]) for i in range(a.shape[0]))


def min_side_for(size: int, floor: int = MIN_SIDE) -> int:
    """The smallest side an image may have for a model of working size `size` (its long side, px): a quarter of
    it, and never under `floor`. An image enlarged more than four times holds no detail the model learned, so
    its score would mean little. The command line and the service both apply this rule."""
    return max(floor, size // 4)


def read_shape(path: Path, *, max_pixels: int = MAX_PIXELS, min_side: int = MIN_SIDE) -> tuple[int, int] | None:
    """An image file's upright (H, W) as `read_image` would give it, from the header alone where PIL reads the file
    (else from a full decode); None when `read_image` would refuse it under the same limits."""
    limits = dict(name=str(path), max_pixels=max_pixels, min_side=min_side)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            with Image.open(path) as img:
                _check_format(img, name=str(path))
                head = _pil_header(img)
                _check_header(head, **limits)
                turned = _orientation(img) in (5, 6, 7, 8)
        return (head.width, head.height) if turned else (head.height, head.width)
    except (BadImage, Image.DecompressionBombError, Image.DecompressionBombWarning):
        return None
    except Exception:  # beyond PIL (16-bit RGB TIFF, ...): the fallback decoder's header checks, by decoding
        try:
            return tuple(read_image(path, max_pixels=max_pixels, min_side=min_side).shape[-2:])
        except BadImage:
            return None


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


def to_model_input(images: list[np.ndarray], *, size: int | tuple[int, int], channels: int) -> torch.Tensor:
    """Native-resolution images to one (B, channels, H, W) batch, (H, W) = size (an int: square), resized
    with antialiasing. A model's working shape has its training images' aspect ratio (`working_shape`), so a
    part from the same camera is scaled, not distorted; the heatmap is resized back to each image's own
    resolution afterwards, so nothing is lost for the user.
    """
    shape = (size, size) if isinstance(size, int) else tuple(size)
    out = [to_channels(torch.from_numpy(resized(arr, shape))[None], channels) for arr in images]
    return torch.cat(out).clamp_(0, 1).contiguous()


def resized(arr: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """(C, H, W) float32 at (C, *shape), by the one resize inputs get (bilinear, antialiased); as given when it
    has that shape already, so an image reduced once is never resized again."""
    if tuple(arr.shape[-2:]) == tuple(shape):
        return arr
    t = torch.from_numpy(arr)[None]
    return F.interpolate(t, size=tuple(shape), mode="bilinear", antialias=True, align_corners=False)[0].numpy()


def shapes_of(images: list[np.ndarray]) -> list[tuple[int, int]]:
    """(H, W) of each (C, H, W) image."""
    return [tuple(im.shape[-2:]) for im in images]


def working_shape(shapes: list[tuple[int, int]], size: int) -> tuple[int, int]:
    """(height, width) with `size` on the long side and the median aspect ratio of images of (H, W) `shapes`,
    both multiples of 16 (the networks halve the side four times): a 4:3 camera at size 256 works at 192 x 256."""
    ratios = sorted(h / w for h, w in shapes)
    ratio = ratios[len(ratios) // 2] if ratios else 1.0
    short = max(32, int(round(size * min(ratio, 1 / ratio) / 16)) * 16)
    return (size, short) if ratio > 1 else (short, size)
