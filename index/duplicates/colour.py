"""Colour check of near-duplicate pairs: a design printed in another palette is not a copy.

The `objects` descriptor barely sees hue: two colourways of one motif (the same drawing in another
palette) look to it like two versions of one picture. The usual edits of a copy -- re-encoding, crops,
resizing, brightness, contrast or saturation changes, a grey proof -- keep the hue of every coloured area;
a colourway moves it. So each image of a near pair gets a small signature, the distribution of hue over its
coloured pixels (each pixel weighted by its chroma in CIELAB), and a pair whose hue distributions lie far
apart is not a near duplicate.

- CIELAB from sRGB: IEC 61966-2-1 (sRGB transfer curve, D65 matrix) and CIE 15:2004 (L*a*b*).
- Hue distance: the earth mover's distance between the two circular hue histograms, in degrees (the
  average turn of hue that makes one distribution into the other); on a circle it is the sum of
  |F - median(F)| over the cumulative differences F (Rabin, Delon and Gousseau, "Circular Earth Mover's
  Distance for the comparison of local features", ICPR 2008; from memory).
- Near-grey images (mean chroma below GREY_CHROMA: a grey proof, a pencil sketch) carry no hue evidence:
  the pair stays, so a grey copy still groups with its colour original.
- Only the middle of the frame is read: borders, mats, scanner beds and rotation fills sit at the edges.
- An image whose file cannot be read has no signature: its pairs stay (no evidence to veto).
docs/duplicates.md (Colour check) gives the measurements behind the constants.
"""
from __future__ import annotations

import numpy as np

DECODE_SIDE = 64  # signatures come from a reduced decode (JPEG draft / box reduction) of about this side
BINS = 36  # hue histogram: 10 degrees a bin, soft (linear) assignment to the two nearest bins
MIDDLE = 0.8  # the central 80% of each side is read
NEUTRAL_CHROMA = 6.0  # a pixel's hue weight is its chroma above this (CIELAB units) -- or above the image's mean
# chroma where that is lower: near-neutral pixels, whose hue a slight cast or JPEG noise swings round the
# circle, carry no weight, while a faintly coloured design (warm greys with a touch of rose) keeps its hue
GREY_CHROMA = 1.5  # an image whose mean chroma is below this looks grey (below a just-noticeable difference of
# about 2.3, Sharma, "Digital Color Imaging Handbook", 2003, from memory): no hue evidence
MAX_HUE_SHIFT = 12.0  # degrees: a pair whose hue distributions lie further apart than this plus SPREAD_FACTOR
SPREAD_FACTOR = 0.5  # times the larger hue spread of the two images is not a copy. An image's hue spread is the
CROP_SIDE = 0.84  # largest hue shift between it and a corner crop keeping 84% of each side (70% of the area):
# how far a crop alone can move its hue histogram (a photograph far more than a repeating pattern)
TONES = 3  # the coloured mass's shares in the darkest, middle and lightest third of the pixels (by L*)
TONE_CHROMA = 10.0  # ... counting chroma above this (a white-balance cast gives a pale ground up to about 10)
MAX_TONE_SHIFT = 0.45  # a pair whose shares differ by more (earth mover's distance, in thirds) is not a copy
SIGNATURE_SIZE = BINS + 1 + TONES + 1  # hue histogram (sums to 1, or all zero), mean chroma, tone shares (idem),
# hue spread


RULE = (
    "colour check: a near pair is not a copy when both images are coloured (mean CIELAB chroma >= {grey:g}) and "
    "their chroma-weighted hue distributions lie more than {hue:g} degrees apart (circular earth mover's "
    "distance) plus {factor:g} x the larger hue spread (how far a crop keeping 70% of the area moves an image's "
    "own distribution), or their colour sits in other tones (its shares in the darkest, middle and lightest "
    "third differ by more than {tone:g}); read from the middle {middle:.0%} of each side. A file that cannot be "
    "read keeps its pairs"
).format(grey=GREY_CHROMA, hue=MAX_HUE_SHIFT, factor=SPREAD_FACTOR, tone=MAX_TONE_SHIFT, middle=MIDDLE)


def _srgb_to_linear(c: np.ndarray) -> np.ndarray:
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


_RGB_TO_XYZ = np.array([[0.4124, 0.3576, 0.1805],
                        [0.2126, 0.7152, 0.0722],
                        [0.0193, 0.1192, 0.9505]])  # IEC 61966-2-1, D65
_WHITE = np.array([0.95047, 1.0, 1.08883])  # D65 reference white (CIE 15:2004, 2-degree observer)


def lab(rgb: np.ndarray) -> np.ndarray:
    """(..., 3) sRGB values 0-255 -> (..., 3) CIELAB (D65)."""
    lin = _srgb_to_linear(np.asarray(rgb, np.float64) / 255.0)
    xyz = lin @ _RGB_TO_XYZ.T / _WHITE
    eps = (6 / 29) ** 3
    f = np.where(xyz > eps, np.cbrt(xyz), xyz / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.stack([116 * f[..., 1] - 16, 500 * (f[..., 0] - f[..., 1]), 200 * (f[..., 1] - f[..., 2])], axis=-1)


def _hue_histogram(a: np.ndarray, b: np.ndarray, neutral: float) -> np.ndarray:
    """Chroma-weighted circular hue histogram (BINS,) of a*, b* values, normalised to sum 1 (all zero if empty)."""
    weight = np.maximum(np.hypot(a, b) - neutral, 0.0)
    pos = (np.degrees(np.arctan2(b, a)) % 360.0) / (360.0 / BINS) - 0.5
    lo = np.floor(pos)
    frac = pos - lo
    hist = np.bincount(lo.astype(int) % BINS, weight * (1 - frac), BINS)
    hist += np.bincount((lo.astype(int) + 1) % BINS, weight * frac, BINS)
    return hist / hist.sum() if hist.sum() > 0 else hist


def signature(rgb: np.ndarray) -> np.ndarray:
    """(h, w, 3) uint8 -> (SIGNATURE_SIZE,) float32 of the frame's middle: the chroma-weighted hue histogram,
    the mean chroma, the tone shares (TONES) and the hue spread (the largest hue shift between a quarter of
    the middle and the whole: how much a crop could move the histogram)."""
    h, w = rgb.shape[:2]
    dy, dx = int(round(h * (1 - MIDDLE) / 2)), int(round(w * (1 - MIDDLE) / 2))
    middle = rgb[dy:h - dy or None, dx:w - dx or None]
    hh, ww = middle.shape[:2]
    lightness, a, b = (v.reshape(hh, ww) for v in lab(middle.reshape(-1, 3)).T)
    chroma = np.hypot(a, b)
    out = np.zeros(SIGNATURE_SIZE, np.float32)
    if chroma.size == 0:
        return out
    neutral = min(NEUTRAL_CHROMA, float(chroma.mean()))  # a faint image is measured against its own level
    out[:BINS] = _hue_histogram(a.ravel(), b.ravel(), neutral)
    out[BINS] = chroma.mean()
    third = np.argsort(np.argsort(lightness.ravel(), kind="stable"), kind="stable") * TONES // chroma.size
    tones = np.bincount(third, np.maximum(chroma.ravel() - TONE_CHROMA, 0.0), TONES)
    if tones.sum() > 0:
        out[BINS + 1:BINS + 1 + TONES] = tones / tones.sum()
    ch, cw = max(1, int(round(hh * CROP_SIDE))), max(1, int(round(ww * CROP_SIDE)))
    corners = [(slice(0, ch), slice(0, cw)), (slice(0, ch), slice(ww - cw, None)),
               (slice(hh - ch, None), slice(0, cw)), (slice(hh - ch, None), slice(ww - cw, None))]
    spread = [hue_shift(_hue_histogram(a[q].ravel(), b[q].ravel(), neutral), out[:BINS]) for q in corners
              if out[:BINS].sum() > 0]
    out[-1] = max(spread) if spread else 0.0
    return out


def hue_shift(p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Circular earth mover's distance in degrees between hue histograms (..., BINS) that sum to 1."""
    f = np.cumsum(np.asarray(p, np.float64) - np.asarray(q, np.float64), axis=-1)
    return np.abs(f - np.median(f, axis=-1, keepdims=True)).sum(axis=-1) * (360.0 / BINS)


def shift(sig_a: np.ndarray, sig_b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(n, SIGNATURE_SIZE) x 2 -> (hue shift in degrees, tone shift in thirds), each (n,); 0 where either image
    is near-grey or has nothing coloured enough (no evidence), NaN where a signature is missing."""
    a, b = np.nan_to_num(sig_a), np.nan_to_num(sig_b)
    grey = (a[:, BINS] < GREY_CHROMA) | (b[:, BINS] < GREY_CHROMA)
    hue_grey = grey | (a[:, :BINS].sum(1) == 0) | (b[:, :BINS].sum(1) == 0)
    hue = np.where(hue_grey, 0.0, hue_shift(a[:, :BINS], b[:, :BINS]))
    ta, tb = a[:, BINS + 1:BINS + 1 + TONES], b[:, BINS + 1:BINS + 1 + TONES]
    tone_grey = grey | (ta.sum(1) == 0) | (tb.sum(1) == 0)
    tone = np.where(tone_grey, 0.0, np.abs(np.cumsum(ta - tb, axis=1)).sum(1))
    missing = np.isnan(sig_a).any(1) | np.isnan(sig_b).any(1)
    hue[missing] = tone[missing] = np.nan
    return hue, tone


def consistent(sig_a: np.ndarray, sig_b: np.ndarray) -> np.ndarray:
    """(n, SIGNATURE_SIZE) x 2 -> (n,) bool: False where both images are coloured and their hues lie more than
    MAX_HUE_SHIFT degrees apart, or their colour sits in other tones (MAX_TONE_SHIFT). A missing signature
    passes."""
    hue, tone = shift(sig_a, sig_b)
    allowed = MAX_HUE_SHIFT + SPREAD_FACTOR * np.maximum(np.nan_to_num(sig_a[:, -1]), np.nan_to_num(sig_b[:, -1]))
    return ~((hue > allowed) | (tone > MAX_TONE_SHIFT))


def read_signature(path: str) -> np.ndarray | None:
    """The signature of an image file, from a reduced decode; None when the file cannot be read."""
    from ..images.decode import DecodeError, open_image

    try:
        image = open_image(path, min_side=DECODE_SIDE).image
        if min(image.size) >= 2 * DECODE_SIDE:
            image = image.reduce(min(image.size) // DECODE_SIDE)
        return signature(np.asarray(image.convert("RGB")))
    except (DecodeError, OSError, ValueError):
        return None


class PairCheck:
    """Callable (i, j) -> bool per pair (positions into `paths`): the colour check, reading each file at most
    once per run (signatures are kept for the run). `read` counts the files read, `vetoed` the pairs refused."""

    def __init__(self, paths: list[str], *, progress: bool = False):
        self.paths = paths
        self.progress = progress
        self.sig = np.full((len(paths), SIGNATURE_SIZE), np.nan, np.float32)
        self.known = np.zeros(len(paths), bool)
        self.read = self.vetoed = 0

    def __call__(self, i: np.ndarray, j: np.ndarray) -> np.ndarray:
        assert i.shape == j.shape, "pair arrays must have one shape"
        need = np.unique(np.concatenate([i, j]))
        need = need[~self.known[need]]
        if len(need):
            self.sig[need] = signatures([self.paths[k] for k in need.tolist()], progress=self.progress)
            self.known[need] = True
            self.read += len(need)
        ok = consistent(self.sig[i], self.sig[j])
        self.vetoed += int((~ok).sum())
        return ok


def signatures(paths: list[str], *, progress: bool = False) -> np.ndarray:
    """(len(paths), SIGNATURE_SIZE) float32; a row of NaN where the file cannot be read."""
    from tqdm import tqdm

    out = np.full((len(paths), SIGNATURE_SIZE), np.nan, np.float32)
    for n, path in enumerate(tqdm(paths, desc="colour check", unit="image", disable=not progress, leave=False,
                                  dynamic_ncols=True)):
        sig = read_signature(path)
        if sig is not None:
            out[n] = sig
    return out
