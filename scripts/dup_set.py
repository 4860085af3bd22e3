"""The labelled set of the duplicate benchmark (scripts/bench_duplicates.py), built from open images.

Originals: scikit-image's bundled images that need no download (`skimage.data`), the left view of its
stereo motorcycle pair, scikit-learn's two `load_sample_images`. Every original gets copies of the kinds
used in copy-detection benchmarks (Douze et al., "The 2021 Image Similarity Dataset and Challenge",
2021): JPEG, crops, resizing, rotations, colour shifts, grayscale, flips, a caption or a border.
Distractors are generated (`distractor` here; `dup_distractors` for the large setting).
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageEnhance, ImageFont, ImageOps

N_DISTRACTORS = 400
EXPORT_QUALITY = 90  # every copy outside the JPEG family is saved as a JPEG at this quality (a usual export)

# scikit-image's bundled images that need no download (`cat` is `chelsea`; `lfw_subset` shows real people)
SKIMAGE_NAMES = ("astronaut", "camera", "chelsea", "coffee", "rocket", "coins", "moon", "page", "text",
                 "horse", "hubble_deep_field", "immunohistochemistry", "retina", "colorwheel", "brick",
                 "grass", "gravel", "cell", "clock", "logo", "microaneurysms", "checkerboard",
                 "shepp_logan_phantom")


# --- the labelled set ----------------------------------------------------------------------------------
def to_rgb(a: np.ndarray) -> Image.Image:
    if a.dtype == bool:
        a = a.astype(np.uint8) * 255
    if a.dtype != np.uint8:
        a = (255 * (a - a.min()) / (np.ptp(a) + 1e-9)).astype(np.uint8)
    im = Image.fromarray(a)
    if im.mode in ("RGBA", "LA"):
        white = Image.new("RGBA", im.size, (255, 255, 255, 255))
        im = Image.alpha_composite(white, im.convert("RGBA"))
    return im.convert("RGB")


def originals() -> dict[str, Image.Image]:
    from skimage import data
    from sklearn.datasets import load_sample_images

    out = {name: to_rgb(getattr(data, name)()) for name in SKIMAGE_NAMES}
    out["motorcycle_left"] = to_rgb(data.stereo_motorcycle()[0])  # the left view only: the right one is a stereo twin
    samples = load_sample_images()
    for path, array in zip(samples.filenames, samples.images):
        out["sklearn-" + Path(path).stem] = Image.fromarray(array)
    return out


def crop_area(im: Image.Image, keep: float, rng: np.random.Generator) -> Image.Image:
    """A crop keeping `keep` of the area (both sides scaled by sqrt(keep)) at a random position."""
    w, h = im.size
    cw, ch = max(8, round(w * math.sqrt(keep))), max(8, round(h * math.sqrt(keep)))
    left, top = int(rng.integers(0, w - cw + 1)), int(rng.integers(0, h - ch + 1))
    return im.crop((left, top, left + cw, top + ch))


def resize(im: Image.Image, f: float) -> Image.Image:
    return im.resize((max(8, round(im.width * f)), max(8, round(im.height * f))), Image.LANCZOS)


def caption(im: Image.Image, rng: np.random.Generator) -> Image.Image:
    out = im.copy()
    draw = ImageDraw.Draw(out)
    size = max(10, im.height // 12)
    font = ImageFont.load_default(size=size)
    text = f"PROOF {int(rng.integers(10, 99))} - not for print"
    x, y = im.width // 20, im.height - size - im.height // 20
    draw.text((x, y), text, font=font, fill=(255, 255, 255), stroke_width=max(1, size // 10), stroke_fill=(0, 0, 0))
    return out


def border(im: Image.Image, rng: np.random.Generator) -> Image.Image:
    width = max(4, min(im.size) // 12)
    colour = tuple(int(c) for c in rng.integers(0, 256, 3))
    return ImageOps.expand(im, border=width, fill=colour)


# family -> {variant: (function(image, rng) -> image, JPEG quality)}
TRANSFORMS = {
    "jpeg": {f"q{q}": (lambda im, rng: im, q) for q in (75, 50, 30, 15)},
    "crop 90/70%": {f"keep{int(k * 100)}": ((lambda k: lambda im, rng: crop_area(im, k, rng))(k), EXPORT_QUALITY)
                    for k in (0.9, 0.7)},
    "crop 50%": {"keep50": (lambda im, rng: crop_area(im, 0.5, rng), EXPORT_QUALITY)},
    "resize 50/25%": {f"x{int(f * 100)}": ((lambda f: lambda im, rng: resize(im, f))(f), EXPORT_QUALITY)
                      for f in (0.5, 0.25)},
    "rotate 3-5 deg": {"+3": (lambda im, rng: im.rotate(3, Image.BICUBIC, expand=True, fillcolor="white"), EXPORT_QUALITY),
                       "-5": (lambda im, rng: im.rotate(-5, Image.BICUBIC, expand=True, fillcolor="white"), EXPORT_QUALITY)},
    "rotate 90 deg": {"90": (lambda im, rng: im.transpose(Image.ROTATE_90), EXPORT_QUALITY)},
    "colour": {"bright+30%": (lambda im, rng: ImageEnhance.Brightness(im).enhance(1.3), EXPORT_QUALITY),
               "contrast-40%": (lambda im, rng: ImageEnhance.Contrast(im).enhance(0.6), EXPORT_QUALITY),
               "saturation+80%": (lambda im, rng: ImageEnhance.Color(im).enhance(1.8), EXPORT_QUALITY)},
    "grayscale": {"gray": (lambda im, rng: im.convert("L").convert("RGB"), EXPORT_QUALITY)},
    "flip": {"hflip": (lambda im, rng: im.transpose(Image.FLIP_LEFT_RIGHT), EXPORT_QUALITY)},
    "caption/border": {"caption": (caption, EXPORT_QUALITY), "border": (border, EXPORT_QUALITY)},
}
# Declared before measuring: the families a CNN descriptor of the whole frame is not built to survive.
HARD_FAMILIES = ("crop 50%", "rotate 90 deg", "flip")
STANDARD_FAMILIES = tuple(f for f in TRANSFORMS if f not in HARD_FAMILIES)


def distractor(i: int, rng: np.random.Generator) -> Image.Image:
    """A generated image of one of five kinds, unrelated to every other image."""
    w, h = int(rng.integers(256, 641)), int(rng.integers(256, 641))
    kind = i % 5
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    if kind == 0:  # shapes on a gradient
        c0, c1 = rng.integers(0, 256, 3), rng.integers(0, 256, 3)
        t = (xx * rng.uniform(-1, 1) + yy * rng.uniform(-1, 1))
        t = (t - t.min()) / (np.ptp(t) + 1e-6)
        im = Image.fromarray((c0 + (c1 - c0) * t[..., None]).astype(np.uint8))
        draw = ImageDraw.Draw(im)
        for _ in range(int(rng.integers(3, 14))):
            x0, y0 = int(rng.integers(0, w)), int(rng.integers(0, h))
            x1, y1 = x0 + int(rng.integers(10, w // 2)), y0 + int(rng.integers(10, h // 2))
            fill = tuple(int(c) for c in rng.integers(0, 256, 3))
            shape = rng.integers(0, 3)
            if shape == 0:
                draw.ellipse((x0, y0, x1, y1), fill=fill)
            elif shape == 1:
                draw.rectangle((x0, y0, x1, y1), fill=fill)
            else:
                draw.polygon([(int(rng.integers(0, w)), int(rng.integers(0, h))) for _ in range(3)], fill=fill)
        return im
    if kind == 1:  # smooth coloured noise at several scales
        acc = np.zeros((h, w, 3), np.float32)
        for scale in (4, 16, 64):
            small = rng.normal(size=(max(2, h // scale), max(2, w // scale), 3)).astype(np.float32)
            layer = np.stack([np.asarray(Image.fromarray(small[..., c]).resize((w, h), Image.BICUBIC)) for c in range(3)], -1)
            acc += layer * rng.uniform(0.3, 1.0)
        acc = (acc - acc.min()) / (np.ptp(acc) + 1e-6)
        return Image.fromarray((255 * acc).astype(np.uint8))
    if kind == 2:  # waves and stripes
        f1, f2 = rng.uniform(0.01, 0.15, 2)
        a1, a2 = rng.uniform(0, np.pi, 2)
        v = np.sin(f1 * (xx * np.cos(a1) + yy * np.sin(a1))) + 0.6 * np.sin(f2 * (xx * np.cos(a2) + yy * np.sin(a2)))
        v = (v - v.min()) / (np.ptp(v) + 1e-6)
        c0, c1 = rng.integers(0, 256, 3), rng.integers(0, 256, 3)
        return Image.fromarray((c0 + (c1 - c0) * v[..., None]).astype(np.uint8))
    if kind == 3:  # blobs (scikit-image's generator), two colours and grain
        from skimage.data import binary_blobs

        side = max(w, h)
        b = binary_blobs(side, blob_size_fraction=float(rng.uniform(0.03, 0.2)),
                         volume_fraction=float(rng.uniform(0.2, 0.6)), rng=int(rng.integers(1 << 30)))[:h, :w]
        c0, c1 = rng.integers(0, 256, 3), rng.integers(0, 256, 3)
        img = np.where(b[..., None], c1, c0).astype(np.float32) + rng.normal(0, 12, (h, w, 1))
        return Image.fromarray(np.clip(img, 0, 255).astype(np.uint8))
    # a "landscape": sky gradient, textured ground, a few bodies
    horizon = int(h * rng.uniform(0.3, 0.7))
    sky0, sky1 = rng.integers(100, 256, 3), rng.integers(0, 200, 3)
    t = (yy / max(1, horizon))[..., None]
    img = sky0 + (sky1 - sky0) * np.clip(t, 0, 1)
    ground = rng.integers(0, 180, 3) + rng.normal(0, 20, (h, w, 1))
    img = np.where((yy >= horizon)[..., None], ground, img)
    im = Image.fromarray(np.clip(img, 0, 255).astype(np.uint8))
    draw = ImageDraw.Draw(im)
    for _ in range(int(rng.integers(1, 5))):
        x0, y0 = int(rng.integers(0, w)), int(rng.integers(horizon // 2, h))
        r = int(rng.integers(8, max(9, w // 6)))
        draw.ellipse((x0 - r, y0 - r, x0 + r, y0 + r), fill=tuple(int(c) for c in rng.integers(0, 256, 3)))
    return im


def build_set(folder: Path, n_distractors: int, seed: int) -> list[dict]:
    """Write the labelled set below `folder` (once); returns one label per file."""
    labels_file = folder / "labels.json"
    if labels_file.exists():
        return json.loads(labels_file.read_text())
    rng = np.random.default_rng(seed)
    labels = []
    for name, im in originals().items():
        path = folder / "originals" / f"{name}.png"
        path.parent.mkdir(parents=True, exist_ok=True)
        im.save(path)
        labels.append({"path": str(path), "source": name, "family": None, "variant": None})
        for family, variants in TRANSFORMS.items():
            for variant, (fn, quality) in variants.items():
                out = fn(im, rng)
                vpath = folder / "copies" / family.replace(" ", "_").replace("/", "-") / variant / f"{name}.jpg"
                vpath.parent.mkdir(parents=True, exist_ok=True)
                out.save(vpath, "JPEG", quality=quality)
                labels.append({"path": str(vpath), "source": name, "family": family, "variant": variant})
    for i in range(n_distractors):
        path = folder / "distractors" / f"d{i:04d}.png"
        path.parent.mkdir(parents=True, exist_ok=True)
        distractor(i, rng).save(path)
        labels.append({"path": str(path), "source": None, "family": None, "variant": None})
    labels_file.write_text(json.dumps(labels, indent=1))
    return labels


def _large_one(args) -> str:
    import dup_distractors

    i, seed, folder = args
    path = Path(folder) / f"{i // 1000:02d}" / f"x{i:06d}.jpg"
    if not path.exists():
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_suffix(".part")
        dup_distractors.make(i, seed).save(tmp, "JPEG", quality=88)
        tmp.rename(path)
    return str(path)


def build_large(folder: Path, n: int, seed: int, workers: int = 2) -> list[str]:
    """n extra distractors (dup_distractors) below `folder`, written once; returns their paths."""
    from multiprocessing import Pool

    jobs = [(i, seed, str(folder)) for i in range(n)]
    with Pool(workers) as pool:
        return pool.map(_large_one, jobs, chunksize=64)
