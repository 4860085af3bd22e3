"""Safe image loading for the indexer.

open_image() turns a path, bytes or binary file object into an 8-bit RGB
Pillow image with EXIF orientation applied, or raises DecodeError with a
short reason fit for the failure table; the metadata comes with it
(index.images.metadata.read_metadata).
"""

from __future__ import annotations

import contextlib
import functools
import io
import os
from dataclasses import dataclass
from typing import IO, Iterator

from PIL import Image, UnidentifiedImageError

from .decode_memory import (ALPHA_MODES, DEEP_MODES, DEFAULT_MAX_DECODE_BYTES, deep_to_8bit, estimate, factor_for,
                            reduce, reduces_first)
from .metadata import read_metadata

SUPPORTED_EXTENSIONS: frozenset[str] = frozenset(
    {".jpg", ".jpeg", ".jpe", ".png", ".webp", ".tif", ".tiff",
     ".bmp", ".gif", ".heic", ".heif"}
)
DEFAULT_MAX_PIXELS = 100_000_000

HEIF_EXTRA_HINT = "pip install 'kinscope[heif]'"

# Only these Pillow plugins may identify a file.  Letting Pillow try all of
# its plugins would accept formats we do not list (and EPS would start
# Ghostscript).  The JPEG plugin also returns "MPO" for JPEGs that carry a
# multi-picture index (many phone photos); MPO has no opener of its own.
_PILLOW_FORMATS = ("JPEG", "PNG", "WEBP", "TIFF", "BMP", "GIF")
_JPEG_FORMATS = frozenset({"JPEG", "MPO"})

# ISOBMFF 'ftyp' major brands used by HEIF still images (ISO/IEC 23008-12).
_HEIF_BRANDS = frozenset(
    {b"heic", b"heix", b"heim", b"heis", b"hevc", b"hevx", b"hevm", b"hevs",
     b"mif1", b"msf1"}
)

# Exif Orientation value -> the Pillow transpose that displays it upright.
_TRANSPOSE = {
    2: Image.Transpose.FLIP_LEFT_RIGHT,
    3: Image.Transpose.ROTATE_180,
    4: Image.Transpose.FLIP_TOP_BOTTOM,
    5: Image.Transpose.TRANSPOSE,
    6: Image.Transpose.ROTATE_270,
    7: Image.Transpose.TRANSVERSE,
    8: Image.Transpose.ROTATE_90,
}


class DecodeError(Exception):
    """An image that cannot be used; .reason is a short plain-language sentence."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


@dataclass(frozen=True)
class Decoded:
    """RGB image (oriented, alpha on white, maybe reduced) plus facts about the file.

    width/height are the full-resolution size after orientation, even when
    `image` was decoded smaller for min_side.
    """

    image: Image.Image
    width: int
    height: int
    format: str
    metadata: dict


# --------------------------------------------------------------------------
# open_image


def open_image(source, *, max_pixels: int = DEFAULT_MAX_PIXELS,
               min_side: int | None = None, max_bytes: int = DEFAULT_MAX_DECODE_BYTES) -> Decoded:
    """Decode `source` (path, bytes or binary file object) into a Decoded.

    max_bytes bounds the memory the decode and its conversion would take (decode_memory.estimate),
    checked from the header before any pixel is decoded."""
    if min_side is not None and (not isinstance(min_side, int) or min_side < 1):
        raise ValueError("min_side must be a positive integer or None")
    with _binary_stream(source) as fp:
        _check_head(fp)
        return _decode_stream(fp, max_pixels, min_side, max_bytes)


@contextlib.contextmanager
def _binary_stream(source) -> Iterator[IO[bytes]]:
    """Yield a seekable binary stream; files we open are closed on exit."""
    if isinstance(source, (bytes, bytearray, memoryview)):
        yield io.BytesIO(bytes(source))
    elif isinstance(source, (str, os.PathLike)):
        try:
            fp = open(source, "rb")
        except OSError as exc:
            raise DecodeError(_os_error_reason(exc)) from exc
        with fp:
            yield fp
    elif hasattr(source, "read"):
        yield _seekable(source)
    else:
        raise TypeError(f"cannot read an image from {type(source).__name__}")


def _seekable(fp) -> IO[bytes]:
    # Pillow seeks while identifying; buffer streams that cannot (sockets, pipes).
    try:
        seekable = getattr(fp, "seekable", None)
        return fp if seekable and seekable() else io.BytesIO(fp.read())
    except Exception as exc:
        raise DecodeError("the uploaded data could not be read") from exc


def _os_error_reason(exc: OSError) -> str:
    if isinstance(exc, FileNotFoundError):
        return "the file does not exist"
    if isinstance(exc, PermissionError):
        return "the file cannot be read (permission denied)"
    if isinstance(exc, IsADirectoryError):
        return "the path is a folder, not a file"
    return f"the file could not be read ({exc.strerror or exc})"


def _check_head(fp: IO[bytes]) -> None:
    """Refuse empty input and HEIF when its plugin is missing, before Pillow."""
    try:
        fp.seek(0)
        head = fp.read(32)
        fp.seek(0)
    except Exception as exc:
        raise DecodeError("the file could not be read") from exc
    if not head:
        raise DecodeError("the file is empty")
    if _looks_like_heif(head) and not _heif_ready():
        raise DecodeError(
            "HEIC/HEIF images need the optional extra: " + HEIF_EXTRA_HINT)


def _looks_like_heif(head: bytes) -> bool:
    # ISOBMFF: the first box is 'ftyp', its payload starts with the major brand.
    return head[4:8] == b"ftyp" and head[8:12] in _HEIF_BRANDS


@functools.cache
def _heif_ready() -> bool:
    """Register pillow-heif's opener once; False when the extra is absent."""
    try:
        import pillow_heif
        pillow_heif.register_heif_opener()
    except Exception:  # ImportError, or a broken/incompatible build
        return False
    return True


def _open_formats() -> tuple[str, ...]:
    return _PILLOW_FORMATS + (("HEIF",) if _heif_ready() else ())


def _decode_stream(fp: IO[bytes], max_pixels: int, min_side: int | None, max_bytes: int) -> Decoded:
    # No warnings.catch_warnings() here: it is not thread-safe and decoding
    # runs in server threads too (see decode_memory.quiet_pillow_warnings and
    # index.ingest.decode_task).  Pillow's bomb warning/error, when raised as an
    # exception, becomes a DecodeError below like any other failure.
    try:
        with Image.open(fp, formats=_open_formats()) as im:
            return _decode_opened(im, max_pixels, min_side, max_bytes)
    except DecodeError:
        raise
    except Exception as exc:  # bad input must never escape raw
        raise DecodeError(_failure_reason(exc)) from exc


def _failure_reason(exc: Exception) -> str:
    if isinstance(exc, UnidentifiedImageError):
        return "the file is not an image in a supported format, or its header is damaged"
    if isinstance(exc, (Image.DecompressionBombError, Image.DecompressionBombWarning)):
        return "the image declares too many pixels to decode safely"
    if isinstance(exc, MemoryError):
        return "the image is too large to decode in the available memory"
    if isinstance(exc, OSError) and exc.errno is not None:
        return _os_error_reason(exc)
    if isinstance(exc, OSError) and "truncated" in str(exc):
        return "the image file is truncated"
    return "the image data is corrupt or uses an unsupported feature"


def _decode_opened(im: Image.Image, max_pixels: int, min_side: int | None, max_bytes: int) -> Decoded:
    full_w, full_h = _checked_size(im, max_pixels)
    _request_draft(im, min_side)
    _checked_bytes(im, min_side, max_bytes)
    im.load()  # full decode now, so truncation surfaces here and not later
    metadata = read_metadata(im)
    orientation = _orientation(im)
    image = _apply_orientation(_small_rgb(im, min_side), orientation)
    if orientation >= 5:  # values 5-8 swap the axes
        full_w, full_h = full_h, full_w
    return Decoded(image, full_w, full_h, im.format or "", metadata)


def _checked_size(im: Image.Image, max_pixels: int) -> tuple[int, int]:
    """Validate the header's declared size before any pixel is decoded."""
    width, height = im.size
    if width <= 0 or height <= 0:
        raise DecodeError("the image has zero width or height")
    if width * height > max_pixels:
        raise DecodeError(
            f"the image is too large to decode safely ({width}x{height} pixels, "
            f"limit {max_pixels:,})")
    return width, height


def _checked_bytes(im: Image.Image, min_side: int | None, max_bytes: int) -> None:
    """Refuse a decode whose pixels and conversion would take more than max_bytes."""
    need = estimate(im, min_side)
    if need > max_bytes:
        raise DecodeError(
            f"the image would take about {need / 1e6:.0f} MB of memory to decode ({im.size[0]}x{im.size[1]} "
            f"pixels, mode {im.mode}; limit {max_bytes / 1e6:.0f} MB)")


def _small_rgb(im: Image.Image, min_side: int | None) -> Image.Image:
    """The decoded image as 8-bit RGB, reduced for min_side; reduced first where that gives the same
    pixels, so no full-size copy is made (decode_memory)."""
    factor = factor_for(im.size, min_side)
    if im.mode in DEEP_MODES:
        return deep_to_8bit(im, factor).convert("RGB")
    if factor >= 2 and reduces_first(im):
        return _to_rgb(reduce(im, factor))
    return _reduce(_to_rgb(im), min_side)


def _request_draft(im: Image.Image, min_side: int | None) -> None:
    """Let libjpeg decode at 1/2, 1/4 or 1/8 scale when that is enough."""
    if not min_side or im.format not in _JPEG_FORMATS:
        return
    width, height = im.size
    short = min(width, height)
    if short // min_side < 2:
        return
    # Ask for the size whose shorter side is min_side; draft() never goes below it.
    im.draft(None, (-(-width * min_side // short), -(-height * min_side // short)))


def _reduce(image: Image.Image, min_side: int | None) -> Image.Image:
    # Box-average by the largest integer factor that keeps min_side.
    factor = min(image.size) // min_side if min_side else 1
    return image.reduce(factor) if factor >= 2 else image


def _to_rgb(im: Image.Image) -> Image.Image:
    """Return a new 8-bit RGB image (never the file-backed `im` itself)."""
    if im.mode in DEEP_MODES:
        return deep_to_8bit(im).convert("RGB")
    if im.mode in ALPHA_MODES or "transparency" in im.info:
        return _composite_on_white(im)
    return im.convert("RGB")


def _composite_on_white(im: Image.Image) -> Image.Image:
    rgba = im.convert("RGBA")  # also turns P/L/RGB 'transparency' into alpha
    white = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
    return Image.alpha_composite(white, rgba).convert("RGB")


def _orientation(im: Image.Image) -> int:
    """The Exif Orientation value, or 1 when missing, broken or out of range."""
    try:
        value = im.getexif().get(0x0112, 1)
    except Exception:
        return 1
    return value if type(value) is int and 1 <= value <= 8 else 1


def _apply_orientation(image: Image.Image, orientation: int) -> Image.Image:
    method = _TRANSPOSE.get(orientation)
    return image.transpose(method) if method is not None else image
