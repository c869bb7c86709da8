"""Decoding every accepted image kind, and clear errors that name the file."""

import io
import struct
import zlib

import numpy as np
import pytest
import tifffile
import torch
from knowngood.training.data import decode_image, read_image, read_shape, to_model_input
from knowngood.training.errors import BadDataset, BadImage, ImageTooLarge
from knowngood.training.folders import load_folder
from PIL import Image, ImageOps


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


@pytest.mark.parametrize(("dtype", "fmt"), [(np.uint8, "PNG"), (np.uint16, "TIFF")])
def test_every_sample_value_maps_to_its_exact_fraction_of_full_scale(dtype, fmt):
    # 8 and 16 bit samples skip the clamps (their quotients already lie in [0, 1]); the result is still value / max
    # in float32, ends included (reference: numpy's own division)
    top = np.iinfo(dtype).max
    values = np.linspace(0, top, 600).round().astype(dtype).reshape(20, 30)
    out = decode_image(_bytes(Image.fromarray(values), fmt), name="v")
    assert out.dtype == np.float32 and np.array_equal(out[0], values.astype(np.float32) / np.float32(top))
    assert out.min() == 0.0 and out.max() == 1.0


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


def _tiff(arr: np.ndarray, pages: int = 1, **kw) -> bytes:
    buf = io.BytesIO()
    with tifffile.TiffWriter(buf) as tw:
        for _ in range(pages):
            tw.write(arr, **kw)
    return buf.getvalue()


FLOAT_RGB = dict(photometric="rgb")  # PIL cannot open float32 RGB: these take the tifffile path


def test_every_decoder_enforces_the_same_limits():
    """The tifffile fallback checks pixel count, minimum side, decoded bytes and frames from the header, like PIL."""
    rgb = np.random.default_rng(0).random((60, 50, 3)).astype(np.float32)
    assert decode_image(_tiff(rgb, **FLOAT_RGB), name="f.tif").shape == (3, 60, 50)
    with pytest.raises(ImageTooLarge, match="f.tif: 50 x 60 pixels is over the limit of 2000 pixels"):
        decode_image(_tiff(rgb, **FLOAT_RGB), name="f.tif", max_pixels=2000)
    with pytest.raises(BadImage, match="too small"):
        decode_image(_tiff(rgb[:8], **FLOAT_RGB), name="f.tif")
    # under the pixel limit, but 3 float32 channels are 12 bytes a pixel: over BYTES_PER_PIXEL x the pixel limit
    with pytest.raises(ImageTooLarge, match="bytes"):
        decode_image(_tiff(rgb, **FLOAT_RGB), name="f.tif", max_pixels=3500)
    rgba16 = np.zeros((60, 50, 4), np.uint16)
    with pytest.raises(ImageTooLarge, match="bytes"):  # the same bound on the PIL path
        decode_image(_tiff(rgba16, photometric="rgb", extrasamples=["unassalpha"]), name="a.tif", max_pixels=3500)
    assert decode_image(_tiff(np.zeros((60, 50), np.uint8)), name="g.tif", max_pixels=3000).shape == (1, 60, 50)


@pytest.mark.parametrize(
    "data",
    [_tiff(np.zeros((40, 40), np.uint8), pages=3), _tiff(np.zeros((40, 40, 3), np.float32), pages=3, **FLOAT_RGB)],
    ids=["8-bit pages (PIL)", "float RGB pages (tifffile)"],
)
def test_multi_page_tiff_is_refused_on_every_path(data):
    with pytest.raises(BadImage, match="p.tif: multi-frame .* 3 frames"):
        decode_image(data, name="p.tif")


def test_a_thousand_page_tiff_is_refused_quickly():
    data = _tiff(np.zeros((16, 16), np.uint8), pages=1000)
    with pytest.raises(BadImage, match="1000 frames"):
        decode_image(data, name="p.tif")


@pytest.mark.parametrize("orientation", range(1, 9))
def test_exif_orientation_is_applied(orientation):
    """Reference: Pillow's ImageOps.exif_transpose on the same file."""
    arr = np.random.default_rng(orientation).integers(0, 256, (24, 40, 3), np.uint8)
    img = Image.fromarray(arr)
    exif = Image.Exif()
    exif[0x0112] = orientation
    data = _bytes(img, "PNG", exif=exif)
    upright = np.asarray(ImageOps.exif_transpose(Image.open(io.BytesIO(data))).convert("RGB"))
    out = decode_image(data, name="o.png")
    np.testing.assert_array_equal(out, np.moveaxis(upright, -1, 0).astype(np.float32) / 255)
    assert out.shape[1:] == ((40, 24) if orientation >= 5 else (24, 40))


def test_tiff_orientation_on_the_tifffile_path():
    arr = np.random.default_rng(3).random((20, 30, 3)).astype(np.float32)
    out = decode_image(_tiff(arr, **FLOAT_RGB, extratags=[(0x0112, "H", 1, 6, True)]), name="o.tif")
    np.testing.assert_array_equal(out, np.moveaxis(np.rot90(arr, -1), -1, 0))


def test_read_shape_gives_the_decoded_shape_from_the_header(tmp_path):
    """Every decoder's upright (H, W), as `read_image` gives it (reference: the decode itself), or None for what
    `read_image` refuses under the same limits."""
    rng = np.random.default_rng(0)
    exif = Image.Exif()
    exif[0x0112] = 6  # the camera held on its side: upright, the image is 40 wide and 24 high turned
    files = {
        "plain.png": _bytes(Image.fromarray(rng.integers(0, 256, (24, 40), np.uint8)), "PNG"),
        "turned.jpg": _bytes(Image.fromarray(rng.integers(0, 256, (24, 40, 3), np.uint8)), "JPEG", exif=exif),
        "turned.png": _bytes(Image.fromarray(rng.integers(0, 256, (24, 40, 3), np.uint8)), "PNG", exif=exif),
        "float.tif": _tiff(rng.random((30, 50, 3)).astype(np.float32), **FLOAT_RGB),  # the tifffile path
    }
    for name, data in files.items():
        (tmp_path / name).write_bytes(data)
        assert read_shape(tmp_path / name) == read_image(tmp_path / name).shape[-2:], name
    assert read_shape(tmp_path / "turned.jpg") == (40, 24)
    (tmp_path / "small.png").write_bytes(files["plain.png"])
    assert read_shape(tmp_path / "small.png", min_side=32) is None  # 24 px: under the limit, as read_image says
    (tmp_path / "pages.tif").write_bytes(_tiff(np.zeros((40, 40), np.uint8), pages=3))
    (tmp_path / "junk.png").write_bytes(b"not an image at all")
    assert read_shape(tmp_path / "pages.tif") is None and read_shape(tmp_path / "junk.png") is None


def test_load_folder_reduces_each_image_as_it_is_read_to_the_very_model_inputs(tmp_path):
    """With a working shape, each image is held at it (the one resize `to_model_input` applies, so the inputs are
    identical and never resized twice) and the native (H, W) are kept."""
    rng = np.random.default_rng(1)
    for i, (h, w) in enumerate([(300, 400), (310, 420), (240, 320)]):
        Image.fromarray(rng.integers(0, 256, (h, w, 3), np.uint8)).save(tmp_path / f"{i}.png")
    native, reduced = load_folder(tmp_path), load_folder(tmp_path, shape=(96, 128))
    assert reduced.shapes == native.shapes == [(300, 400), (310, 420), (240, 320)]
    assert all(im.shape == (3, 96, 128) for im in reduced.images)
    for channels in (1, 3):
        expected = to_model_input(native.images, size=(96, 128), channels=channels)
        assert torch.equal(to_model_input(reduced.images, size=(96, 128), channels=channels), expected)


def test_a_set_of_images_left_in_their_files_needs_their_recorded_sizes(tmp_path):
    # an ImageSet would otherwise read shapes and colours off its images, decoding every file of a large set
    from knowngood.training.folders import ImageFiles, ImageSet

    path = tmp_path / "a.png"
    Image.fromarray(np.full((40, 50), 90, np.uint8)).save(path)
    files = ImageFiles([path], {})
    with pytest.raises(ValueError, match="shapes and colours"):
        ImageSet([path], files)
    assert ImageSet([path], files, shapes=[(40, 50)], colours=[1]).shapes == [(40, 50)]
    assert load_folder(tmp_path, in_files=True).shapes == [(40, 50)]  # load_folder records them as it checks
