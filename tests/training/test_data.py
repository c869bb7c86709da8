"""Decoding every accepted image kind, and clear errors that name the file."""

import io
import struct
import zlib

import numpy as np
import pytest
from PIL import Image

from training.data import decode_image, load_folder, to_model_input
from training.errors import BadDataset, BadImage, ImageTooLarge


def _bytes(img: Image.Image, fmt: str, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, fmt, **kw)
    return buf.getvalue()


def test_gray_rgb_16bit_and_cmyk():
    gray = decode_image(_bytes(Image.fromarray(np.full((20, 30), 128, np.uint8)), "PNG"), name="g")
    assert gray.shape == (1, 20, 30) and gray.dtype == np.float32 and gray.max() == pytest.approx(128 / 255)
    rgb = np.zeros((20, 30, 3), np.uint8)
    rgb[..., 0] = 255
    assert decode_image(_bytes(Image.fromarray(rgb), "BMP"), name="c").shape == (3, 20, 30)
    deep = decode_image(_bytes(Image.fromarray(np.full((20, 30), 65535, np.uint16)), "TIFF"), name="t")
    assert deep.shape == (1, 20, 30) and deep.max() == pytest.approx(1.0)
    cmyk = decode_image(_bytes(Image.new("CMYK", (20, 20), (0, 255, 255, 0)), "JPEG"), name="k")
    assert cmyk.shape == (3, 20, 20) and cmyk[0].mean() > 0.8 > cmyk[1].mean()  # CMYK red stays red


def test_rgb_file_holding_gray_is_gray():
    arr = np.repeat(np.arange(600, dtype=np.uint8).reshape(20, 30)[..., None] % 200, 3, axis=2)
    assert decode_image(_bytes(Image.fromarray(arr), "PNG"), name="g").shape == (1, 20, 30)


def _chunk(kind: bytes, body: bytes) -> bytes:
    return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))


def _png_header_only(w: int, h: int) -> bytes:
    """A valid PNG header claiming w x h pixels, with one tiny data chunk: a decompression bomb's shape."""
    ihdr = struct.pack(">IIBBBBB", w, h, 8, 0, 0, 0, 0)
    idat = zlib.compress(b"\x00" * 1024)
    return b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", ihdr) + _chunk(b"IDAT", idat) + _chunk(b"IEND", b"")


@pytest.mark.parametrize(
    ("data", "error", "words"),
    [
        (b"", BadImage, "empty"),
        (b"not an image at all", BadImage, "not a readable image"),
        (_png_header_only(100_000, 100_000), ImageTooLarge, "over the limit"),
        (_bytes(Image.new("L", (8, 8)), "PNG"), BadImage, "too small"),
    ],
)
def test_bad_bytes_name_the_file(data, error, words):
    with pytest.raises(error, match=words) as info:
        decode_image(data, name="part-0042.png")
    assert "part-0042.png" in str(info.value)


def test_truncated_jpeg_and_animated_gif():
    jpeg = _bytes(Image.fromarray(np.random.default_rng(0).integers(0, 255, (64, 64), np.uint8)), "JPEG")
    with pytest.raises(BadImage, match="cam.jpg"):
        decode_image(jpeg[: len(jpeg) // 2], name="cam.jpg")
    frames = [Image.new("L", (32, 32), v) for v in (0, 255)]
    buf = io.BytesIO()
    frames[0].save(buf, "GIF", save_all=True, append_images=frames[1:])
    with pytest.raises(BadImage, match="animated"):
        decode_image(buf.getvalue(), name="a.gif")


def test_folder_error_names_file_or_skips_and_reports(tmp_path):
    Image.fromarray(np.zeros((20, 20), np.uint8)).save(tmp_path / "a.png")
    (tmp_path / "sub").mkdir()
    Image.fromarray(np.zeros((20, 20), np.uint8)).save(tmp_path / "sub" / "b.TIF")
    (tmp_path / "broken.jpg").write_bytes(b"\xff\xd8\xff garbage")
    with pytest.raises(BadImage, match="broken.jpg"):
        load_folder(tmp_path)
    ok = load_folder(tmp_path, skip_bad=True)
    assert [p.name for p in ok.paths] == ["a.png", "b.TIF"] and ok.skipped[0][0].name == "broken.jpg"
    with pytest.raises(BadDataset, match="not a folder"):
        load_folder(tmp_path / "missing")


def test_model_input_resizes_and_converts_colour():
    imgs = [np.random.rand(3, 40, 70).astype(np.float32), np.random.rand(1, 128, 128).astype(np.float32)]
    x = to_model_input(imgs, size=64, channels=1)
    assert x.shape == (2, 1, 64, 64) and 0 <= float(x.min()) and float(x.max()) <= 1
    assert to_model_input(imgs, size=32, channels=3).shape == (2, 3, 32, 32)
