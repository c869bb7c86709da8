"""Folders of images: walking them, reading every image with its errors named or skipped, the set's fingerprint.

Whole-image training holds each image at the working shape (`load_folder`'s `shape`); a tiled model's images stay
in their files (`ImageFiles`) and are decoded one at a time when a tile or a score needs them.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from knowngood.training.data import IMAGE_SUFFIXES, read_image, resized, shapes_of
from knowngood.training.errors import BadDataset, BadImage


def skip_reason(path: Path, exc: Exception) -> str:
    """Why `path` was skipped, without the path the error message already starts with (it is printed once)."""
    return str(exc).removeprefix(f"{path}: ")


def list_images(folder: Path) -> list[Path]:
    """Image files under a folder, recursively, in a stable order."""
    folder = Path(folder)
    if not folder.is_dir():
        raise BadDataset(f"{folder}: not a folder")
    return sorted(p for p in folder.rglob("*") if p.suffix.lower() in IMAGE_SUFFIXES and p.is_file())


class ImageFiles(Sequence):
    """Images that stay in their files: item i is `read_image(paths[i], **limits)`, decoded when it is asked for,
    so a loop over them holds one at a time (300 five-megapixel RGB images would be 18 GB as float32)."""

    def __init__(self, paths: list[Path], limits: dict):
        self.paths, self.limits = list(paths), dict(limits)

    def __len__(self) -> int:
        return len(self.paths)

    def __getitem__(self, i: int) -> np.ndarray:
        return read_image(self.paths[i], **self.limits)

    def take(self, idx) -> ImageFiles:
        return ImageFiles([self.paths[i] for i in idx], self.limits)


def subset(images: Sequence, idx) -> Sequence:
    """The images at `idx`: a list, or (`ImageFiles`) a view that still decodes them one at a time."""
    return images.take(idx) if isinstance(images, ImageFiles) else [images[i] for i in idx]


@dataclass
class ImageSet:
    """Images of one folder, with what was skipped and why: at native resolution (a list, or `ImageFiles`), or each
    reduced to one working shape as it was read (`load_folder`'s `shape`); `shapes` are the native (H, W) and
    `colours` the channels (1 or 3) of each image either way."""

    paths: list[Path]
    images: Sequence[np.ndarray]
    skipped: list[tuple[Path, str]] = field(default_factory=list)  # (path, reason without the path)
    folder: Path | None = None  # the folder as given, for the bundle's and the report's record
    shapes: list[tuple[int, int]] = field(default_factory=list)  # native (H, W); empty: the images' own
    colours: list[int] = field(default_factory=list)  # channels of each image; empty: the images' own

    def __post_init__(self):
        if isinstance(self.images, ImageFiles) and len(self.images) and not (self.shapes and self.colours):
            # reading them off the images would decode every file here: `load_folder` records both as it checks
            raise ValueError("an ImageSet of ImageFiles needs their shapes and colours (load_folder gives them)")
        self.shapes = self.shapes or shapes_of(self.images)
        self.colours = self.colours or [im.shape[0] for im in self.images]

    @property
    def channels(self) -> int:
        """3 if any image has colour, else 1: the colour mode a model trained on this set uses."""
        return 3 if 3 in self.colours else 1

    def fingerprint(self) -> str:
        return fingerprint(self.paths)


def fingerprint(paths: list[Path]) -> str:
    """SHA-256 over the sorted file names and contents: identifies the exact image set in a bundle."""
    h = hashlib.sha256()
    for p in sorted(paths, key=lambda q: q.name):
        h.update(p.name.encode())
        h.update(hashlib.sha256(p.read_bytes()).digest())
    return h.hexdigest()


def load_folder(
    folder: Path,
    *,
    skip_bad: bool = False,
    min_count: int = 1,
    shape: tuple[int, int] | None = None,
    in_files: bool = False,
    leave_out: Callable[[Path], bool] | None = None,
    **limits,
) -> ImageSet:
    """Reads every image under `folder`, except those `leave_out` names (`limits`: as `decode_image`'s). An
    unreadable file is an error naming it, or skipped and reported. With `shape` (H, W), each image is reduced to it
    (`resized`) as soon as it is decoded; with `in_files`, each is decoded to check it and then left in its file
    (`ImageFiles`). Either way only one image at a time is held at full resolution."""
    paths, images, shapes, colours, skipped = [], [], [], [], []
    for path in list_images(folder):
        if leave_out is not None and leave_out(path):
            continue
        try:
            arr = read_image(path, **limits)
        except BadImage as exc:
            if not skip_bad:
                raise
            skipped.append((path, skip_reason(path, exc)))
            continue
        paths.append(path)
        shapes.append(tuple(arr.shape[-2:]))
        colours.append(arr.shape[0])
        if not in_files:
            images.append(arr if shape is None else resized(arr, shape))
    if len(paths) < min_count:
        raise BadDataset(f"{folder}: found {len(paths)} readable images, need at least {min_count}")
    if in_files:
        images = ImageFiles(paths, limits)
    return ImageSet(paths, images, skipped, Path(folder), shapes, colours)


def expand_paths(paths: list[Path]) -> list[Path]:
    """The image files named on a command line: files as given, folders walked (`list_images`)."""
    files: list[Path] = []
    for p in paths:
        if p.is_dir():
            files.extend(list_images(p))
        elif p.is_file():
            files.append(p)
        else:
            raise BadDataset(f"{p}: no such file or folder")
    if not files:
        raise BadDataset(f"no images found in {', '.join(map(str, paths))}")
    return files
