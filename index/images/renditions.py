"""Images for people to look at: cached thumbnails, display-size copies, and region crops.

Files are only ever opened by catalog id (the caller passes the catalog row), never by a path
that came from outside, and only while the file is the one catalogued: its resolved path inside the
indexed roots, its size and modification time those of the catalog (checked_file).
"""
from __future__ import annotations

import contextlib
import io
import os
import stat
from pathlib import Path
from typing import Iterator

from PIL import Image

from ..common.errors import ArchiveError
from ..common.files import atomic_write
from ..common.paths import below
from .decode import DecodeError, open_image

THUMB_SIZES = (128, 256, 512)
THUMBS = "thumbs"  # the thumbnail cache, in the database folder
DISPLAY_SIDE = 1600


def _jpeg(image: Image.Image, quality: int = 85) -> bytes:
    buf = io.BytesIO()
    image.convert("RGB").save(buf, "JPEG", quality=quality, optimize=True)
    return buf.getvalue()


class Unservable(Exception):
    """The catalogued file is not what may be shown under this id (the message says why)."""


@contextlib.contextmanager
def checked_file(row: dict, roots: list[str]):
    """The row's file, opened, if its resolved path lies inside one of the (resolved) indexed roots
    and its size and modification time are still the catalog's; Unservable otherwise. The checks
    are made on the open file, so a link re-pointed meanwhile cannot slip another file in."""
    real = os.path.realpath(row["path"])
    if not below(roots)(real):
        raise Unservable("its file lies outside the indexed folders (a link pointing elsewhere?)")
    with open(real, "rb") as fh:
        st = os.fstat(fh.fileno())
        if not stat.S_ISREG(st.st_mode):
            raise Unservable("its path is no longer a regular file")
        if st.st_size != row["size"] or st.st_mtime != row["mtime"]:
            raise Unservable("its file changed since it was indexed (size or date differ); run `kinscope index`")
        yield fh


def thumbnail(row: dict, size: int, cache: Path, source=None) -> bytes:
    """A JPEG whose longer side is `size`, generated once per content hash and kept in `cache` (when
    the database folder can be written)."""
    if size not in THUMB_SIZES:
        raise ValueError(f"thumbnail size must be one of {THUMB_SIZES}")
    path = Path(cache) / f"{row['id']}-{(row.get('sha256') or 'x')[:12]}-{size}.jpg"
    if path.exists():
        return path.read_bytes()
    image = open_image(source or row["path"], min_side=size).image
    image.thumbnail((size, size), Image.LANCZOS)
    data = _jpeg(image, 82)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        atomic_write(path, data)
    except OSError:
        pass  # a read-only database folder: served without a cache
    return data


def cached_thumbnails(cache: Path) -> Iterator[tuple[Path, int | None]]:
    """Each cached thumbnail file, with the catalog id its name starts with (None: not one of ours)."""
    if Path(cache).is_dir():
        for p in Path(cache).glob("*.jpg"):
            head = p.name.split("-")[0]
            yield p, int(head) if head.isdigit() else None


def display(row: dict, source=None) -> bytes:
    """The whole image as a browser-safe JPEG, no side longer than DISPLAY_SIDE."""
    image = open_image(source or row["path"], min_side=DISPLAY_SIDE).image
    image.thumbnail((DISPLAY_SIDE, DISPLAY_SIDE), Image.LANCZOS)
    return _jpeg(image, 88)


def crop(image: Image.Image, box: list[float] | tuple[float, ...]) -> Image.Image:
    """Crop a box given as fractions [x0, y0, x1, y1] of the image."""
    x0, y0, x1, y1 = box
    if not (0 <= x0 < x1 <= 1 and 0 <= y0 < y1 <= 1):
        raise ValueError("a box is four fractions 0 <= x0 < x1 <= 1, 0 <= y0 < y1 <= 1")
    w, h = image.size
    left, top = int(x0 * w), int(y0 * h)
    right, bottom = max(left + 1, int(round(x1 * w))), max(top + 1, int(round(y1 * h)))
    return image.crop((left, top, right, bottom))


def query_image(query, min_side: int, box=None) -> Image.Image:
    """A query (a path, bytes or a PIL image) as an RGB image, cropped to `box` (fractions). A file is
    decoded at `min_side` as at indexing time (index.images.preprocess.decode_side), so that its query
    descriptor equals its stored one; a region needs the full resolution."""
    if isinstance(query, Image.Image):
        image = query.convert("RGB")
    else:
        if isinstance(query, (str, os.PathLike)) and not os.path.isfile(query):
            raise ArchiveError(f"query image not found: {query}")
        try:
            image = open_image(query, min_side=min_side if box is None else None).image
        except DecodeError as exc:
            what = "the uploaded file" if isinstance(query, (bytes, bytearray)) else query
            raise ArchiveError(f"cannot use {what} as a query: {exc.reason}") from None
    if box is not None:
        try:
            image = crop(image, box)
        except (ValueError, TypeError) as exc:
            raise ArchiveError(f"bad region box {box!r}: {exc}") from None
    return image


def patch(row: dict, box: list[float], size: int = 96, source=None) -> bytes:
    """A region of an indexed image as a small JPEG (for channel exemplars)."""
    image = crop(open_image(source or row["path"], min_side=512).image, box)
    image.thumbnail((size, size), Image.LANCZOS)
    if max(image.size) < size:
        scale = size / max(image.size)
        image = image.resize((max(1, int(image.width * scale)), max(1, int(image.height * scale))), Image.NEAREST)
    return _jpeg(image, 85)
