"""What a decode costs in memory, checked before any pixel is decoded; deep images made 8-bit in stripes.

Pillow holds a decoded image at 1 byte a pixel (L, P, 1), 2 (I;16) or 4 (RGB, RGBA, CMYK, I, F: three
bands are stored in four bytes). Converting a full-size image makes further full-size copies: a
16-bit 9950 x 9950 grey PNG (190 kB on disk) took 2.0 GB in one decode worker when it was scaled to
8 bits through 32-bit integers and then to RGB before being reduced (docs/reliability.md). So the
reduction comes first wherever it gives the same pixels, deep images are scaled a stripe at a time,
and `estimate` is the decoder's own account of its peak, compared with a limit before decoding.
"""
from __future__ import annotations

import warnings

import numpy as np
from PIL import Image

DEFAULT_MAX_DECODE_BYTES = 1 << 30  # per decode; with one decode worker per core, a bound per core
STRIPE_BYTES = 2 << 20  # source rows converted at a time (deep_to_8bit, reduce)

DEEP_MODES = frozenset({"I;16", "I;16B", "I;16L", "I;16N", "I", "F"})
ALPHA_MODES = frozenset({"RGBA", "LA", "PA", "RGBa"})
# Modes Image.reduce averages correctly (LA and RGBA premultiplied by Pillow itself). P is left out:
# averaging palette indices is meaningless.
REDUCE_FIRST = frozenset({"L", "RGB", "RGBA", "LA", "CMYK"})


def pixel_bytes(mode: str) -> int:
    """Bytes Pillow stores per pixel in this mode."""
    if mode in ("1", "L", "P"):
        return 1
    if mode.startswith("I;16"):
        return 2
    return 4


def reduces_first(im: Image.Image) -> bool:
    """Can this image be reduced before its conversion to RGB (same result, less memory)?"""
    return im.mode in REDUCE_FIRST and "transparency" not in im.info


def factor_for(size: tuple[int, int], min_side: int | None) -> int:
    return max(1, min(size) // min_side) if min_side else 1


def estimate(im: Image.Image, min_side: int | None) -> int:
    """Peak bytes of decoding `im` (header read, draft applied) and making it the RGB result: the
    decoded image plus the conversion's copies (full-size ones only where it cannot reduce first)."""
    width, height = im.size
    full = width * height
    decoded = full * pixel_bytes(im.mode)
    factor = factor_for(im.size, min_side)
    small = -(-width // factor) * -(-height // factor)
    stripes = STRIPE_BYTES * 12  # a stripe's crop, its array and float64 sums (deep) or premultiplied copy
    if im.mode in DEEP_MODES:  # stripes, then an 8-bit grey image and its RGB copy at the output size
        return decoded + stripes + small * 5
    if factor >= 2 and reduces_first(im):  # reduced, then converted (alpha: RGBA, white, composite)
        return decoded + stripes + small * 4 * 4
    copies = 3 if im.mode in ALPHA_MODES or "transparency" in im.info else 1  # RGBA, white, composite
    return decoded + full * 4 * copies + small * 4


def reduce(im: Image.Image, factor: int) -> Image.Image:
    """Image.reduce, a stripe of rows at a time for alpha images (Pillow premultiplies a full-size copy
    of them first). Stripes start at multiples of `factor`, so every box is the one Image.reduce takes."""
    if im.mode not in ("RGBA", "LA"):
        return im.reduce(factor)
    width, height = im.size
    step = factor * max(1, STRIPE_BYTES // max(1, width * pixel_bytes(im.mode) * factor))
    out = Image.new(im.mode, (-(-width // factor), -(-height // factor)))
    for top in range(0, height, step):
        out.paste(im.crop((0, top, width, min(height, top + step))).reduce(factor), (0, top // factor))
    return out


def deep_to_8bit(im: Image.Image, factor: int = 1) -> Image.Image:
    """A 16-bit, 32-bit integer or float grey image as 8-bit "L", box-averaged by `factor` (output size
    rounded up, as Image.reduce does), converted STRIPE_BYTES of source rows at a time."""
    width, height = im.size
    step = factor * max(1, STRIPE_BYTES // max(1, width * pixel_bytes(im.mode) * factor))
    sixteen = im.mode.startswith("I;16")
    scale = None if sixteen else _range_scale(im, step)
    out = []
    for top in range(0, height, step):
        block = np.asarray(im.crop((0, top, width, min(height, top + step))))
        if sixteen and factor == 1:
            # round(v / 257) in integers: maps 0..65535 onto 0..255 exactly.
            out.append(((block.astype(np.uint32) + 128) // 257).astype(np.uint8))
            continue
        values = _box_mean(block, factor) if factor > 1 else block
        values = values / 257 if sixteen else scale(values)
        out.append(np.clip(np.rint(values), 0, 255).astype(np.uint8))
    return Image.fromarray(np.vstack(out))


def _box_mean(block: np.ndarray, factor: int) -> np.ndarray:
    """Mean of each factor x factor box (partial boxes at the right and bottom edges too)."""
    h, w = block.shape
    rows, cols = np.arange(0, h, factor), np.arange(0, w, factor)
    sums = np.add.reduceat(np.add.reduceat(block, rows, axis=0, dtype=np.float64), cols, axis=1)
    counts = np.outer(np.minimum(factor, h - rows), np.minimum(factor, w - cols))
    return sums / counts


def _range_scale(im: Image.Image, step: int):
    """Pillow does not say what range "I"/"F" pixels use. Assume the usual ones: float 0..1, else
    16-bit 0..65535; anything else is stretched (the range read over the whole image first)."""
    width, height = im.size
    low, high = np.inf, -np.inf
    for top in range(0, height, step):
        values = _finite(np.asarray(im.crop((0, top, width, min(height, top + step)))))
        low, high = min(low, float(values.min())), max(high, float(values.max()))
    is_float = im.mode == "F"

    def scale(values: np.ndarray) -> np.ndarray:
        values = _finite(values)
        if is_float and low >= 0 and high <= 1:
            return values * 255
        if low >= 0 and high <= 65535:
            return values / 257
        return (values - low) * (255 / (high - low)) if high > low else values * 0

    return scale


def _finite(values: np.ndarray) -> np.ndarray:
    return np.nan_to_num(values.astype(np.float32), nan=0.0, posinf=0.0, neginf=0.0)


def quiet_pillow_warnings() -> None:
    """Pillow's warnings (DecompressionBombWarning below our own pixel limit, "Corrupt EXIF data" and
    the like) never reach the user's terminal. For the kinscope command and decode workers only
    (process-wide filters; a library user keeps Pillow's defaults). Decode workers also record them
    with the file (index.ingest.decode_task)."""
    warnings.filterwarnings("ignore", category=Image.DecompressionBombWarning)
    warnings.filterwarnings("ignore", module=r"PIL(\.|$)")
