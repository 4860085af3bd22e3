"""Images for people to look at: cached thumbnails, display-size copies, and region crops.

Files are only ever opened by catalog id (the caller passes the catalog row), never by a path
that came from outside.
"""
from __future__ import annotations

import io
from pathlib import Path

from PIL import Image

from .decode import open_image
from .store import atomic_write

THUMB_SIZES = (128, 256, 512)
DISPLAY_SIDE = 1600


def _jpeg(image: Image.Image, quality: int = 85) -> bytes:
    buf = io.BytesIO()
    image.convert("RGB").save(buf, "JPEG", quality=quality, optimize=True)
    return buf.getvalue()


def thumbnail(row: dict, size: int, cache: Path) -> bytes:
    """A JPEG whose longer side is `size`, generated once per content hash and kept in `cache`."""
    if size not in THUMB_SIZES:
        raise ValueError(f"thumbnail size must be one of {THUMB_SIZES}")
    path = Path(cache) / f"{row['id']}-{(row.get('sha256') or 'x')[:12]}-{size}.jpg"
    if path.exists():
        return path.read_bytes()
    image = open_image(row["path"], min_side=size).image
    image.thumbnail((size, size), Image.LANCZOS)
    data = _jpeg(image, 82)
    path.parent.mkdir(parents=True, exist_ok=True)
    atomic_write(path, data)
    return data


def display(row: dict) -> bytes:
    """The whole image as a browser-safe JPEG, no side longer than DISPLAY_SIDE."""
    image = open_image(row["path"], min_side=DISPLAY_SIDE).image
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


def patch(row: dict, box: list[float], size: int = 96) -> bytes:
    """A region of an indexed image as a small JPEG (for channel exemplars)."""
    image = crop(open_image(row["path"], min_side=512).image, box)
    image.thumbnail((size, size), Image.LANCZOS)
    if max(image.size) < size:
        scale = size / max(image.size)
        image = image.resize((max(1, int(image.width * scale)), max(1, int(image.height * scale))), Image.NEAREST)
    return _jpeg(image, 85)
