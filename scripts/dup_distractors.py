"""Procedural distractors for the large duplicate benchmark (scripts/bench_duplicates.py --large N).

None of these is a photograph: they are generated so that the set can grow to ten thousand items and
more without downloading anything. Each kind imitates a statistic or a look of real archive content:
- dead leaves: opaque discs and rectangles of random colour, size drawn from a power law, occluding one
  another; the occlusion model reproduces the scale invariance of natural photographs (Lee, Mumford
  and Huang, "Occlusion models for natural images", IJCV 2001);
- 1/f colour fields: noise whose power spectrum falls as 1/f^2, the spectrum of natural images
  (Field, "Relations between the statistics of natural images ...", JOSA A 1987; from memory);
- landscapes: a sky gradient, fractal ridge lines (1/f profiles), textured ground, a sun;
- pages: lines of random words in the default font on off-white paper, some with a picture box
  (scanned documents);
- cells: blurred blobs on a dark ground with grain (fluorescence microscopy frames);
- the five kinds of the small benchmark (shapes on gradients, smooth noise, waves, blobs, simple landscapes).
They are harder than nothing and easier than real photographs; the benchmark says so where it reports them.
"""
from __future__ import annotations

import numpy as np
from PIL import Image, ImageDraw, ImageFilter, ImageFont

SYLLABLES = ("ka", "lo", "mi", "ren", "sa", "tor", "vel", "un", "pe", "dra", "is", "mon", "te", "ba", "or", "qui")


def _size(rng: np.random.Generator) -> tuple[int, int]:
    return int(rng.integers(224, 449)), int(rng.integers(224, 449))


def pink_field(h: int, w: int, rng: np.random.Generator, slope: float = 1.0) -> np.ndarray:
    """(h, w) noise with amplitude spectrum 1/f^slope, scaled to 0..1."""
    fy = np.fft.fftfreq(h)[:, None]
    fx = np.fft.rfftfreq(w)[None, :]
    f = np.sqrt(fx * fx + fy * fy)
    f[0, 0] = 1.0
    spectrum = (rng.normal(size=f.shape) + 1j * rng.normal(size=f.shape)) / f ** slope
    spectrum[0, 0] = 0
    v = np.fft.irfft2(spectrum, s=(h, w))
    return (v - v.min()) / (np.ptp(v) + 1e-9)


def dead_leaves(rng: np.random.Generator) -> Image.Image:
    w, h = _size(rng)
    im = Image.new("RGB", (w, h), tuple(int(c) for c in rng.integers(0, 256, 3)))
    draw = ImageDraw.Draw(im)
    palette = rng.integers(0, 256, (int(rng.integers(4, 12)), 3))
    for _ in range(int(rng.integers(150, 400))):
        r = min(max(w, h), int(4 / rng.uniform(0.02, 1.0) ** 1.5))  # power-law sizes: many small, few large
        x, y = int(rng.integers(-r, w + r)), int(rng.integers(-r, h + r))
        fill = tuple(int(c) for c in np.clip(palette[rng.integers(len(palette))] + rng.normal(0, 18, 3), 0, 255))
        if rng.random() < 0.6:
            draw.ellipse((x - r, y - r, x + r, y + r), fill=fill)
        else:
            draw.rectangle((x - r, y - r // 2, x + r, y + r // 2), fill=fill)
    grain = rng.normal(0, 6, (h, w, 1))
    return Image.fromarray(np.clip(np.asarray(im, np.float32) + grain, 0, 255).astype(np.uint8))


def colour_field(rng: np.random.Generator) -> Image.Image:
    w, h = _size(rng)
    slope = float(rng.uniform(0.8, 1.4))
    channels = [pink_field(h, w, rng, slope) for _ in range(3)]
    mix = rng.dirichlet(np.ones(3), 3)  # correlated channels, as in photographs
    img = np.stack(channels, -1) @ mix.T
    img = (img - img.min()) / (np.ptp(img) + 1e-9)
    return Image.fromarray((255 * img).astype(np.uint8))


def landscape(rng: np.random.Generator) -> Image.Image:
    w, h = _size(rng)
    yy = np.arange(h, dtype=np.float32)[:, None, None] / h
    top, bottom = rng.integers(60, 256, 3), rng.integers(120, 256, 3)
    img = np.broadcast_to(top + (bottom - top) * yy, (h, w, 3)).copy()
    for layer in range(int(rng.integers(1, 4))):  # ridges, farther ones paler
        ridge = pink_field(8, w, rng, 1.2)[0]
        base = h * (0.35 + 0.15 * layer + rng.uniform(-0.05, 0.05))
        line = base - (ridge - 0.5) * h * rng.uniform(0.1, 0.35)
        colour = rng.integers(20, 160, 3) + 30 * (2 - layer)
        below = np.arange(h)[:, None] >= line[None, :]
        texture = pink_field(h, w, rng, 1.0)[..., None] * 50 - 25
        img = np.where(below[..., None], colour + texture, img)
    im = Image.fromarray(np.clip(img, 0, 255).astype(np.uint8))
    if rng.random() < 0.5:
        draw = ImageDraw.Draw(im)
        r = int(rng.integers(8, max(9, w // 10)))
        x, y = int(rng.integers(r, w - r)), int(rng.integers(r, max(r + 1, h // 3)))
        draw.ellipse((x - r, y - r, x + r, y + r), fill=tuple(int(c) for c in rng.integers(200, 256, 3)))
    return im


def page(rng: np.random.Generator) -> Image.Image:
    w, h = _size(rng)
    paper = rng.integers(225, 256, 3)
    im = Image.new("RGB", (w, h), tuple(int(c) for c in paper))
    draw = ImageDraw.Draw(im)
    size = int(rng.integers(9, 16))
    font = ImageFont.load_default(size=size)
    ink = tuple(int(c) for c in rng.integers(0, 80, 3))
    margin = int(rng.integers(10, 40))
    y = margin
    box = rng.random() < 0.4
    while y < h - margin - size:
        if box and abs(y - h // 3) < size:  # a picture box on part of the page
            bh = int(h * rng.uniform(0.15, 0.3))
            draw.rectangle((margin, y, w - margin, y + bh), fill=tuple(int(c) for c in rng.integers(40, 200, 3)))
            y += bh + size
            continue
        words = " ".join("".join(rng.choice(SYLLABLES, int(rng.integers(1, 4)))) for _ in range(int(rng.integers(3, 12))))
        draw.text((margin, y), words, font=font, fill=ink)
        y += int(size * rng.uniform(1.3, 1.9))
    noise = rng.normal(0, 4, (h, w, 1))
    return Image.fromarray(np.clip(np.asarray(im, np.float32) + noise, 0, 255).astype(np.uint8))


def cells(rng: np.random.Generator) -> Image.Image:
    w, h = _size(rng)
    im = Image.new("RGB", (w, h), tuple(int(c) for c in rng.integers(0, 30, 3)))
    draw = ImageDraw.Draw(im)
    hue = rng.integers(0, 3)
    for _ in range(int(rng.integers(10, 80))):
        r = int(rng.integers(4, 24))
        x, y = int(rng.integers(0, w)), int(rng.integers(0, h))
        c = np.zeros(3, int)
        c[hue] = int(rng.integers(120, 256))
        c[(hue + 1) % 3] = int(rng.integers(0, 120))
        draw.ellipse((x - r, y - int(r * rng.uniform(0.6, 1.0)), x + r, y + r), fill=tuple(int(v) for v in c))
    im = im.filter(ImageFilter.GaussianBlur(float(rng.uniform(1.0, 3.0))))
    grain = rng.normal(0, 8, (h, w, 1))
    return Image.fromarray(np.clip(np.asarray(im, np.float32) + grain, 0, 255).astype(np.uint8))


KINDS = (dead_leaves, colour_field, landscape, page, cells)


def make(i: int, seed: int) -> Image.Image:
    """The i-th distractor of a seed: the kinds above in turn, every sixth one a small-benchmark kind."""
    rng = np.random.default_rng([seed, i])
    if i % 6 == 5:
        from dup_set import distractor

        return distractor(i // 6, rng)
    return KINDS[(i - i // 6) % len(KINDS)](rng)
