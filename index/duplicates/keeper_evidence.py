"""Evidence for the keeper rule (index/duplicates/keeper.py), read from a catalog row and the member's own file.

Read at duplicate time, for the members of near groups only: whether the file is on disk as a regular
file (never through a link), the JPEG quantisation tables (header only), and one full decode from which
the uniform border or rotation padding, the amount of fine detail, colour and tones are measured.
Byte-identical copies need no pixels (they share them). The cost is in docs/duplicates.md.
"""
from __future__ import annotations

import os
import stat
from dataclasses import dataclass

import numpy as np

FILL_MATCH = 16  # a pixel belongs to the padding when every channel is within 16 levels of the fill colour
FILL_SHARE = 0.5  # ... and the frame's outer ring is at least half made of that colour
PEEL_PASSES = 3  # layers of uniform border taken off at most (see content_mask)
BLUR_BAND = 3  # pixels between two layers that JPEG and resampling blur (of the reduced copy)
RUN_SMOOTHING = 0.03  # padding runs are compared with the rows (columns) within 3% of the side either way
OUTLINE_RANGE = (0.95, 1.08)  # what remains must be a rectangle at some angle (see outline_ratio)
EDGE_MARGIN = 4  # detail is not measured within 4 pixels (of the reduced copy) of the padding
NOISE_GRADIENT = 2.0  # grey levels per pixel: smaller gradients count as noise (see detail_count)
CONTENT_SIDE = 1024  # padding is found on a copy reduced to at most this many pixels a side
ANALYSED_PIXELS = 4_000_000  # detail is measured on at most this many pixels ...
TILE_GRID = 8  # ... taken as the centres of an 8 x 8 grid of cells
LOSSLESS_FORMATS = {"PNG", "BMP", "TIFF", "PPM"}

# ITU-T T.81 (JPEG) Annex K, table K.1: the example luminance quantisation table (natural order), which
# libjpeg scales by quality; tests/test_keeper.py checks the estimate against Pillow's encoder.
_K1_LUMINANCE = np.array([
    16, 11, 10, 16, 24, 40, 51, 61, 12, 12, 14, 19, 26, 58, 60, 55, 14, 13, 16, 24, 40, 57, 69, 56,
    14, 17, 22, 29, 51, 87, 80, 62, 18, 22, 37, 56, 68, 109, 103, 77, 24, 35, 55, 64, 81, 104, 113, 92,
    49, 64, 78, 87, 103, 121, 120, 101, 72, 92, 95, 98, 112, 100, 103, 99], np.int64)


def _ijg_table_sums() -> np.ndarray:
    """Sum of the luminance table libjpeg writes at each quality 1..100 (its jpeg_quality_scaling)."""
    q = np.arange(1, 101)
    scale = np.where(q < 50, 5000 // q, 200 - 2 * q)
    tables = np.clip((_K1_LUMINANCE[None, :] * scale[:, None] + 50) // 100, 1, 255)
    return tables.sum(1)


_IJG_SUMS = _ijg_table_sums()


def jpeg_quality(luminance_table) -> float:
    """libjpeg-equivalent quality (1-100) of a luminance quantisation table: the quality whose scaled
    standard table has the nearest sum (other encoders' tables get their nearest equivalent)."""
    total = int(np.sum(np.asarray(luminance_table, np.int64)))
    return float(1 + int(np.argmin(np.abs(_IJG_SUMS - total))))


@dataclass
class Evidence:
    """What the rule knows about one member. None = not measured (unknown is not held against it)."""
    path: str
    eligible: bool = True
    why_not: str | None = None  # why it cannot be the keeper
    prefer_rank: int = 0
    content_pixels: float | None = None  # pixels inside the picture (full resolution)
    padding: float | None = None  # fraction of the frame that is uniform border or rotation padding
    detail: float | None = None  # fine-detail count: gradient energy / variance (magnification-invariant)
    quality: float | None = None  # JPEG-equivalent quality; 100 for lossless formats
    colour: bool | None = None
    tones: tuple | None = None  # grey levels of the picture's 1st, 50th and 99th percentiles
    captured_at: str | None = None
    mtime: float | None = None

    @property
    def sharpness(self) -> float | None:
        if self.detail is None or not self.content_pixels:
            return None
        return self.detail / self.content_pixels

    def as_dict(self) -> dict:
        r = lambda v, n: None if v is None else round(float(v), n)  # noqa: E731
        return {"eligible": self.eligible, "why_not": self.why_not, "prefer_rank": self.prefer_rank,
                "content_pixels": None if self.content_pixels is None else int(self.content_pixels),
                "padding": r(self.padding, 4), "detail": r(self.detail, 1), "jpeg_quality": self.quality,
                "colour": self.colour, "tones": None if self.tones is None else [round(v, 1) for v in self.tones],
                "captured_at": self.captured_at}


# --- reading the evidence ----------------------------------------------------------------------------------
def on_disk(path: str, size: int | None) -> str | None:
    """None when `path` is a regular file of the catalogued size reached without any link; else why not."""
    try:
        st = os.lstat(path)
    except FileNotFoundError:
        return "the file is no longer there"
    except OSError as exc:
        return f"the file cannot be examined ({exc.strerror or exc})"
    if stat.S_ISLNK(st.st_mode):
        return "a symbolic link (the file it points to is what counts)"
    if not stat.S_ISREG(st.st_mode):
        return "not a regular file"
    if os.path.realpath(path) != os.path.abspath(path):
        return "reached through a linked folder"
    if size is not None and st.st_size != size:
        return "its size differs from the catalog (changed since indexing)"
    return None


def prefer_rank(path: str, prefer: list[str]) -> int:
    """Index of the first preferred folder holding `path`; len(prefer) when none does."""
    real = os.path.realpath(path)
    for rank, folder in enumerate(prefer):
        folder = os.path.realpath(folder)
        if real == folder or real.startswith(folder.rstrip(os.sep) + os.sep):
            return rank
    return len(prefer)


def header_quality(path: str) -> float | None:
    """Compression from the file header alone: JPEG tables, lossless formats 100, others None."""
    from PIL import Image

    try:
        with Image.open(path) as im:
            fmt = im.format
            if fmt in ("JPEG", "MPO"):
                tables = getattr(im, "quantization", None) or {}
                return jpeg_quality(tables[min(tables)]) if tables else None
            if fmt == "TIFF":
                return None if im.info.get("compression") in ("jpeg", "tiff_jpeg") else 100.0
            if fmt == "WEBP":
                return 100.0 if _webp_lossless(path) else None
            return 100.0 if fmt in LOSSLESS_FORMATS else None
    except Exception:  # unreadable headers are judged by the other steps
        return None


def _webp_lossless(path: str) -> bool:
    with open(path, "rb") as fh:
        head = fh.read(4096)
    return head[12:16] == b"VP8L" or (head[12:16] == b"VP8X" and b"VP8L" in head[30:] and b"VP8 " not in head[30:])


def _run_lengths(match: np.ndarray) -> np.ndarray:
    """Per row: how many pixels from the left edge match before the first that does not."""
    return np.where(match.all(1), match.shape[1], np.argmin(match, axis=1))


def _running_min(values: np.ndarray, half: int) -> np.ndarray:
    padded = np.pad(values, half, mode="edge")
    return np.lib.stride_tricks.sliding_window_view(padded, 2 * half + 1).min(1)


def _runs_from_edges(match: np.ndarray) -> np.ndarray:
    """Pixels reached from an edge along a row or a column through matching pixels only.

    Each run's length is the smallest among its neighbouring rows (or columns), RUN_SMOOTHING of the
    side either way: padding changes its width smoothly from row to row, while a run that goes on into
    a part of the picture of the fill's colour sticks out from its neighbours and is cut back.
    """
    h, w = match.shape
    out = np.zeros((h, w), bool)
    half = max(2, int(min(h, w) * RUN_SMOOTHING))
    left, right = (_running_min(_run_lengths(m), half) for m in (match, match[:, ::-1]))
    top, bottom = (_running_min(_run_lengths(m), half) for m in (match.T, match.T[:, ::-1]))
    cols, rows = np.arange(w)[None, :], np.arange(h)[:, None]
    out |= cols < left[:, None]
    out |= cols >= w - right[:, None]
    out |= rows < top[None, :]
    out |= rows >= h - bottom[None, :]
    return out


_DIRECTIONS = [(np.cos(a), np.sin(a)) for a in np.arange(8) * np.pi / 4]


def outline_ratio(inside: np.ndarray) -> float:
    """Area of `inside` over the area of the octagon through its outermost points in eight directions.

    About 1 for a rectangle at any angle (a bordered or rotated picture: its outermost points are its
    corners), 1.11 or more for round shapes, far below 1 for ragged ones (a picture's own background
    eaten from the edges). The outermost points are the means of the outermost 0.1%, so that JPEG
    ringing along the edges does not move them.
    """
    ys, xs = np.nonzero(inside)
    if len(ys) < 64:
        return 0.0
    corners = []
    for ux, uy in _DIRECTIONS:
        reach = xs * ux + ys * uy
        out = reach >= np.quantile(reach, 0.999)
        corners.append((xs[out].mean(), ys[out].mean()))
    area = 0.5 * abs(sum(x0 * y1 - x1 * y0 for (x0, y0), (x1, y1) in zip(corners, corners[1:] + corners[:1])))
    return len(ys) / area if area else 0.0


def _peel(colours: np.ndarray, pad: np.ndarray, ring: np.ndarray) -> np.ndarray | None:
    """`pad` grown by the runs of the ring's colour, or None when the ring is not mostly one colour or
    what remains is not a rectangle at some angle."""
    fill = np.median(colours[ring], axis=0)
    match = np.abs(colours - fill).max(2) <= FILL_MATCH
    if match[ring].mean() < FILL_SHARE:
        return None
    grown = _runs_from_edges(match | pad)
    inside = ~grown
    if inside.sum() > 0.995 * (~pad).sum() or not OUTLINE_RANGE[0] <= outline_ratio(inside) <= OUTLINE_RANGE[1]:
        return None
    return grown


def content_mask(rgb: np.ndarray) -> np.ndarray:
    """True for pixels inside the picture: not part of a uniform border or rotation padding.

    The fill colour is the median of the frame's outer ring, when at least half of that ring matches it
    (every channel within FILL_MATCH levels). Padding is what matches it in an unbroken run from an
    edge along a row or a column, which covers rectangular borders and the corner triangles a rotation
    leaves. It counts only when what remains is a rectangle at some angle (outline_ratio within
    OUTLINE_RANGE): a picture's own uniform background (an object on white, a dark sky) leaves a
    ragged or round remainder and is not padding. Up to PEEL_PASSES layers are taken off this way (a
    border added around a picture that has margins of its own), each from the ring just inside the
    last, past the band that JPEG and resampling blur between two layers.
    """
    h, w, _ = rgb.shape
    colours = rgb.astype(np.int16)
    pad = base = np.zeros((h, w), bool)
    ring = np.zeros((h, w), bool)
    ring[0], ring[-1], ring[:, 0], ring[:, -1] = True, True, True, True
    for _ in range(PEEL_PASSES):
        grown = _peel(colours, base, ring)
        if grown is None:
            break
        pad = grown
        inner = _erode(~pad, BLUR_BAND)
        base, ring = ~inner, inner & ~_erode(inner, 1)  # the next layer starts past the blur band
        if ring.sum() < 64:
            break
    return ~pad


def detail_count(grey: np.ndarray, inside: np.ndarray | None, content_pixels: float) -> float | None:
    """Gradient energy over variance inside the picture: sum |grad I|^2 / var(I), for `content_pixels`.

    Magnifying a picture by f multiplies its pixels by f^2 and divides each squared gradient by f^2, so
    the count stays put; cropping, shrinking, blurring or heavy compression lower it; brightness and
    contrast changes cancel out. Squared gradients below NOISE_GRADIENT^2 (8-bit rounding, JPEG noise)
    are not counted. Pictures above ANALYSED_PIXELS are measured on an even grid of tiles (a
    systematic sample, so detail concentrated in one part is neither missed nor over-counted) and the
    sum is scaled to `content_pixels`.
    """
    h, w = grey.shape
    keep = min(1.0, ANALYSED_PIXELS / (w * h)) ** 0.5
    cells = TILE_GRID if keep < 1 else 1
    energy = count = total = squares = 0.0
    for ty in range(cells):
        for tx in range(cells):
            y0, y1 = h * ty // cells, h * (ty + 1) // cells
            x0, x1 = w * tx // cells, w * (tx + 1) // cells
            th, tw = max(3, int((y1 - y0) * keep)), max(3, int((x1 - x0) * keep))
            ys, xs = y0 + (y1 - y0 - th) // 2, x0 + (x1 - x0 - tw) // 2
            g = grey[ys:ys + th, xs:xs + tw].astype(np.float32)
            ok = np.ones((th - 2, tw - 2), bool) if inside is None else \
                inside[ys + 1:ys + th - 1, xs + 1:xs + tw - 1] & inside[ys + 1:ys + th - 1, xs + 2:xs + tw] \
                & inside[ys + 2:ys + th, xs + 1:xs + tw - 1]
            centre = g[1:-1, 1:-1]
            dx, dy = (g[1:-1, 2:] - centre)[ok], (g[2:, 1:-1] - centre)[ok]
            energy += float(np.maximum(dx * dx + dy * dy - NOISE_GRADIENT ** 2, 0.0).sum())
            values = centre[ok].astype(np.float64)
            count, total, squares = count + len(values), total + values.sum(), squares + (values * values).sum()
    if count < 64:
        return None
    var = squares / count - (total / count) ** 2
    return 0.0 if var < 1e-6 else energy / var * content_pixels / count


def _erode(mask: np.ndarray, steps: int) -> np.ndarray:
    out = mask.copy()
    for _ in range(steps):
        out[1:] &= out[:-1].copy()
        out[:-1] &= out[1:].copy()
        out[:, 1:] &= out[:, :-1].copy()
        out[:, :-1] &= out[:, 1:].copy()
    return out


def pixel_evidence(path: str) -> dict:
    """content_pixels, padding, detail and colour from one full decode.

    Padding and colour are found on a copy reduced to CONTENT_SIDE pixels a side; detail needs the
    full resolution (see detail_count).
    """
    from PIL import Image

    from ..images.decode import DecodeError, open_image

    try:
        image = open_image(path).image.convert("RGB")
    except (DecodeError, OSError, ValueError):
        return {}
    w, h = image.size
    factor = max(1, -(-max(w, h) // CONTENT_SIDE))
    small = np.asarray(image.reduce(factor) if factor > 1 else image)
    inside_small = content_mask(small)
    share = float(inside_small.mean())
    chroma = np.abs(small.astype(np.int16) - small.mean(2, keepdims=True).astype(np.int16)).max(2)
    luma = np.asarray(Image.fromarray(small).convert("L"))[inside_small]
    tones = tuple(float(v) for v in np.percentile(luma, [1, 50, 99]))
    grey = np.asarray(image.convert("L"))  # ITU-R BT.601 luma
    inside = np.asarray(Image.fromarray(_erode(inside_small, EDGE_MARGIN)).resize((w, h), Image.NEAREST)) \
        if share < 1 else None
    return {"content_pixels": share * w * h, "padding": 1.0 - share,
            "detail": detail_count(grey, inside, share * w * h),
            "colour": bool((chroma[inside_small] > 8).mean() > 0.01), "tones": tones}


def gather(row: dict, *, prefer: list[str], pixels: bool) -> Evidence:
    """The evidence for one catalog row (path, width, height, size, mtime, captured_at)."""
    path = row["path"]
    why = on_disk(path, row.get("size"))
    ev = Evidence(path=path, eligible=why is None, why_not=why, prefer_rank=prefer_rank(path, prefer),
                  captured_at=row.get("captured_at") or None, mtime=row.get("mtime"))
    if row.get("width") and row.get("height"):
        ev.content_pixels = float(row["width"] * row["height"])
    if why is None and pixels:
        ev.quality = header_quality(path)
        for key, value in pixel_evidence(path).items():
            setattr(ev, key, value)
    return ev
