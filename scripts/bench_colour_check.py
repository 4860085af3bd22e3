#!/usr/bin/env python3
"""How tolerant the colour check of near pairs (index/duplicates/colour.py) is to copy edits, and what it refuses.

Signatures only, no descriptors: each picture against edited copies of itself (JPEG 85 after the edit, JPEG 30
for "jpeg30"), and the demo archive's colourways of one motif against each other. Pictures: the demo archive's
220 originals at half size (our invented textile studio; demo_archive/key.csv names motif and colourway) and
scikit-image's bundled images (`skimage.data`, those that need no download). The edits are the colour and
quality kinds of the copy-detection literature (Douze et al. 2021) plus the white-balance cast and lighting of
the demo's re-scans (scripts/make_demo_archive.py: channel gains 1 +- t on red and blue); hue turns in HSV
(scikit-image rgb2hsv / hsv2rgb) are the colourways. Prints the share of copies kept per edit and of pairs
refused.

    .venv/bin/python scripts/bench_colour_check.py        # about 1 min
"""
from __future__ import annotations

import csv
import io
import sys
from itertools import combinations
from pathlib import Path

import numpy as np
from PIL import Image, ImageEnhance

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from index.duplicates import colour as dc  # noqa: E402

DEMO = Path(__file__).resolve().parents[1] / "demo_archive"
SKIMAGE = ("astronaut", "coffee", "chelsea", "rocket", "immunohistochemistry", "retina", "logo", "hubble_deep_field",
           "coins", "colorwheel", "cat", "page")


def jpeg(image: Image.Image, quality: int = 85) -> Image.Image:
    buf = io.BytesIO()
    image.convert("RGB").save(buf, "JPEG", quality=quality)
    return Image.open(io.BytesIO(buf.getvalue())).convert("RGB")


def cast(image: Image.Image, t: float) -> Image.Image:
    a = np.asarray(image, np.float64) * np.array([1 + t, 1.0, 1 - t])
    return Image.fromarray(np.clip(a, 0, 255).astype(np.uint8))


def gamma(image: Image.Image, g: float) -> Image.Image:
    return Image.fromarray((255 * (np.asarray(image) / 255.0) ** g).round().astype(np.uint8))


def hue_turn(image: Image.Image, degrees: float) -> Image.Image:
    from skimage import color

    hsv = color.rgb2hsv(np.asarray(image))
    hsv[..., 0] = (hsv[..., 0] + degrees / 360.0) % 1.0
    return Image.fromarray((color.hsv2rgb(hsv) * 255).round().astype(np.uint8))


def crop(image: Image.Image, corner: int) -> Image.Image:
    w, h = image.size
    x, y = (0, 0) if corner == 0 else (w - int(w * 0.84), h - int(h * 0.84))
    return image.crop((x, y, x + int(w * 0.84), y + int(h * 0.84)))


COPIES = {
    "warm 5%": lambda i: cast(i, 0.05), "cool 5%": lambda i: cast(i, -0.05),
    "warm 8%": lambda i: cast(i, 0.08), "cool 8%": lambda i: cast(i, -0.08),
    "gamma 0.8": lambda i: gamma(i, 0.8), "gamma 1.25": lambda i: gamma(i, 1.25),
    "bright 0.85": lambda i: ImageEnhance.Brightness(i).enhance(0.85),
    "bright 1.3": lambda i: ImageEnhance.Brightness(i).enhance(1.3),
    "contrast 1.12": lambda i: ImageEnhance.Contrast(i).enhance(1.12),
    "contrast 0.6": lambda i: ImageEnhance.Contrast(i).enhance(0.6),
    "saturation 1.8": lambda i: ImageEnhance.Color(i).enhance(1.8),
    "grey": lambda i: i.convert("L").convert("RGB"),
    "crop 70% a": lambda i: crop(i, 0), "crop 70% b": lambda i: crop(i, 1), "jpeg30": lambda i: i,
}
TURNS = {f"hue +{d}": (lambda i, d=d: hue_turn(i, d)) for d in (30, 60, 120, 180)}


def sig(image: Image.Image) -> np.ndarray:
    image = image.convert("RGB")
    image.thumbnail((96, 96))
    return dc.signature(np.asarray(image))


def kept(originals: list[Image.Image], edits: dict) -> dict[str, float]:
    base = np.array([sig(i) for i in originals])
    out = {}
    for name, edit in edits.items():
        copies = np.array([sig(jpeg(edit(i), 30 if name == "jpeg30" else 85)) for i in originals])
        out[name] = float(dc.consistent(base, copies).mean())
    return out


def main() -> None:
    with open(DEMO / "key.csv", newline="") as fh:
        rows = [r for r in csv.DictReader(fh) if r["kind"] == "original"]
    demo = []
    for r in rows:
        with Image.open(DEMO / r["path"]) as im:
            demo.append(im.convert("RGB").resize((im.width // 2, im.height // 2)))
    from skimage import data

    photos = []
    for name in SKIMAGE:
        try:
            a = getattr(data, name)()
        except Exception:  # noqa: BLE001 -- an image that needs a download is left out
            continue
        photos.append(Image.fromarray((np.stack([a] * 3, -1) if a.ndim == 2 else a[..., :3]).astype(np.uint8)))
    print(f"share of copies kept (demo: {len(demo)} originals; scikit-image: {len(photos)} pictures)")
    print(f"{'edit':16s} {'demo':>6s} {'skimage':>8s}")
    d, p = kept(demo, COPIES), kept(photos, COPIES)
    for name in COPIES:
        print(f"{name:16s} {d[name]:6.3f} {p[name]:8.3f}")
    t = kept(photos, TURNS)
    print("share of hue turns refused (scikit-image): " + ", ".join(f"{k} {1 - v:.3f}" for k, v in t.items()))
    sigs = np.array([sig(i) for i in demo])
    pairs = np.array([(a, b) for a, b in combinations(range(len(rows)), 2)
                      if rows[a]["motif"] == rows[b]["motif"] and rows[a]["colourway"] != rows[b]["colourway"]])
    refused = 1 - dc.consistent(sigs[pairs[:, 0]], sigs[pairs[:, 1]]).mean()
    print(f"demo: pairs of two colourways of one motif refused {refused:.3f} of {len(pairs)}")


if __name__ == "__main__":
    main()
