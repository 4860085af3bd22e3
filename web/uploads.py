"""An uploaded query, reduced on arrival to what later requests need, never kept at full size.

A 60-megapixel upload decoded in full is about 240 MB in Pillow; 64 of them would take gigabytes.
What a query needs is much less: the network's input (input_size square, 3 bytes a pixel) for
whole-image searches and explanations, and a display copy whose longer side is at most
DISPLAY_SIDE, kept as JPEG bytes, shown on the page and cropped for region searches.
"""
from __future__ import annotations

import ctypes
import ctypes.util
import io
from dataclasses import dataclass

import numpy as np
from PIL import Image

from index.api import DISPLAY_SIDE, fit_square, open_image

DISPLAY_QUALITY = 90


@dataclass(frozen=True)
class KeptQuery:
    pixels: np.ndarray  # (S, S, 3) uint8: the whole upload as the network sees it
    display: bytes  # JPEG, longer side <= DISPLAY_SIDE
    width: int  # the upload's own size, after EXIF orientation
    height: int

    @property
    def nbytes(self) -> int:
        return self.pixels.nbytes + len(self.display)

    def image(self, box=None) -> Image.Image:
        """What Archive.search / explain take: the network input, or the display copy for a box
        (the archive crops the box out of it)."""
        if box is None:
            return Image.fromarray(self.pixels)
        with Image.open(io.BytesIO(self.display)) as im:
            return im.convert("RGB")


def _trimmer():
    try:
        return ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6").malloc_trim
    except (OSError, AttributeError):  # not glibc: nothing to trim
        return None


_MALLOC_TRIM = _trimmer()


def release_freed_memory() -> None:
    """Give freed heap memory back to the system (glibc's malloc_trim; elsewhere nothing).

    A full decode of a large PNG, TIFF or WebP passes through a few hundred MB that are freed at
    once, but glibc keeps freed heap memory in each thread's arena: under a flood of such uploads
    over the server's threads the process stayed 1.7 GB larger than before (measured, see
    docs/reliability.md). Trimming after each decode keeps that to what is actually kept."""
    if _MALLOC_TRIM is not None:
        _MALLOC_TRIM(0)


def keep(data: bytes, max_pixels: int, input_size: int) -> KeptQuery:
    """Decode an upload once, reduced to what is kept. Raises index.api.DecodeError.

    open_image refuses an image declaring more than max_pixels from its header, before any pixel
    is decoded; min_side=DISPLAY_SIDE lets a large JPEG decode at 1/2, 1/4 or 1/8 scale (libjpeg's
    draft mode) while its shorter side stays at least DISPLAY_SIDE."""
    decoded = open_image(data, max_pixels=max_pixels, min_side=DISPLAY_SIDE)
    image = decoded.image
    pixels = fit_square(image, input_size)
    image.thumbnail((DISPLAY_SIDE, DISPLAY_SIDE), Image.LANCZOS)  # in place: the decode is not kept
    buf = io.BytesIO()
    image.save(buf, "JPEG", quality=DISPLAY_QUALITY)
    return KeptQuery(pixels, buf.getvalue(), decoded.width, decoded.height)
