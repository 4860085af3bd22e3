#!/usr/bin/env python3
"""Generate kinscope's demo archive: the swatch library of an invented studio.

The Tansyford Print Room is a fictional small textile studio.  Its pattern
library is drawn procedurally here (stripes, gingham, dots, florals, plaid ...)
in several colourways and two repeat scales, filed by season, and then
"damaged" the way real archives are: re-scans of existing swatches, exact
copies sent to clients, and a few broken uploads.  ``key.csv`` records the
ground truth so searches over the archive can be checked.

Output is deterministic: the same ``--seed`` gives byte-identical files with
the same modification times.  The script only ever deletes files that its own
previous ``key.csv`` lists, and refuses to touch a folder holding anything else.

Needs only Pillow and numpy.
"""

from __future__ import annotations

import argparse
import csv
import io
import math
import os
import sys
import time
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from xml.sax.saxutils import escape

import numpy as np
from PIL import Image, ImageDraw

STUDIO = "Tansyford Print Room"
DEFAULT_SEED = 20240205
DEFAULT_OUT = Path(__file__).resolve().parents[1] / "demo_archive"

SS = 2  # supersampling factor: motifs are drawn at SS x size, then reduced, for smooth edges
SCANNER_BED = (206, 204, 198)  # the grey lid of the flatbed, visible around skewed re-scans
SCANNER_MAKE = "Studio flatbed"
KEY_NAME = "key.csv"
README_NAME = "README.md"
KEY_FIELDS = ["path", "kind", "source", "motif", "colourway", "notes", "modified"]
OLD_KEY_FIELDS = KEY_FIELDS[:-1]  # keys written before `modified` was recorded

# name: (background, main, second, accent)
COLOURWAYS = {
    "rust and cream": ("#efe6d2", "#b4532a", "#7a3b1e", "#d9a441"),
    "sea glass": ("#e6f0ec", "#7fb8a8", "#2f6f6a", "#c6ddd2"),
    "ink and bone": ("#ede8dd", "#1f2a3a", "#5a6679", "#a89f8c"),
    "moss and honey": ("#f1e8c8", "#5e6b2f", "#c99a2e", "#8a8f4e"),
    "harbour blue": ("#dce6ee", "#24476b", "#6c93b8", "#e3bf5f"),
    "heather": ("#ebe3ea", "#8c6a8f", "#54405d", "#c9b3c6"),
    "marigold": ("#fff4dc", "#e8a317", "#c0561b", "#6b8e3d"),
    "charcoal and rose": ("#e9e4e2", "#3a3838", "#d48a8f", "#8c7f7c"),
    "sage and clay": ("#eeeadf", "#9caf88", "#b86f52", "#5d6b4f"),
    "midnight plum": ("#2b2238", "#7e4a7a", "#d7b9d5", "#c9a25c"),
}

# repeat multiplier applied to each motif's base repeat size
SCALES = {"small": 1.0, "large": 2.0}

# season folder, short code used in file names, first and last day of work
SEASONS = [
    ("2024-spring", "24S", "2024-02-05", "2024-05-24"),
    ("2024-autumn", "24A", "2024-08-19", "2024-11-29"),
    ("2025-spring", "25S", "2025-02-03", "2025-05-30"),
    ("2025-autumn", "25A", "2025-08-18", "2025-11-28"),
]
PROOFS_DIR, PROOFS_DATES = "client-proofs", ("2025-12-01", "2025-12-12")
RESCANS_DIR, RESCANS_DATES = "rescans-2026", ("2026-01-12", "2026-01-30")
INBOX_DIR, INBOX_DATES = "inbox", ("2026-02-02", "2026-02-04")
KEY_DATE = "2026-02-06"

N_RESCANS = 25
N_COPIES = 6
N_PNG, N_WEBP, N_TIFF = 5, 6, 1
# share of frame shapes: square swatches, landscape and portrait cut-offs (w, h)
FRAMES = [((384, 384), 0.75), ((448, 320), 0.15), ((320, 448), 0.10)]


# --------------------------------------------------------------------------
# drawing helpers


def rgb(hex_colour: str) -> np.ndarray:
    return np.array([int(hex_colour[i : i + 2], 16) for i in (1, 3, 5)], dtype=np.float64)


def mix(a: np.ndarray, b: np.ndarray, t: float) -> np.ndarray:
    return a + (b - a) * t


@dataclass
class Palette:
    bg: np.ndarray
    main: np.ndarray
    second: np.ndarray
    accent: np.ndarray

    @classmethod
    def named(cls, name: str) -> "Palette":
        return cls(*(rgb(c) for c in COLOURWAYS[name]))


def coords(w: int, h: int) -> tuple[np.ndarray, np.ndarray]:
    """Pixel-centre coordinates of the supersampled canvas, in output pixels."""
    xs = (np.arange(w * SS) + 0.5) / SS
    ys = (np.arange(h * SS) + 0.5) / SS
    return np.meshgrid(xs, ys)


def solid(w: int, h: int, colour: np.ndarray) -> np.ndarray:
    return np.broadcast_to(colour, (h * SS, w * SS, 3)).copy()


def paint(canvas: np.ndarray, alpha: np.ndarray, colour: np.ndarray) -> None:
    canvas += alpha[..., None] * (colour - canvas)


def inside(signed_dist: np.ndarray) -> np.ndarray:
    """Soft coverage from a signed distance (output px, positive inside)."""
    return np.clip(signed_dist * SS + 0.5, 0.0, 1.0)


def bands(v: np.ndarray, widths, colours) -> np.ndarray:
    """Colour by the band of a repeating width sequence that v falls in."""
    edges = np.cumsum(widths)
    idx = np.searchsorted(edges, np.mod(v, edges[-1]), side="right")
    idx = np.minimum(idx, len(widths) - 1)
    return np.asarray(colours, dtype=np.float64)[idx]


def smooth_noise(w: int, h: int, cell: float, rng: np.random.Generator) -> np.ndarray:
    """Value noise in [-1, 1] with features about `cell` output px across."""
    gw, gh = max(2, int(w / cell) + 2), max(2, int(h / cell) + 2)
    grid = rng.uniform(-1, 1, (gh, gw)).astype(np.float32)
    return np.asarray(Image.fromarray(grid, "F").resize((w * SS, h * SS), Image.BICUBIC), dtype=np.float64)


def ellipse_points(cx, cy, a, b, angle, n=28):
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    x, y = a * np.cos(t), b * np.sin(t)
    ca, sa = math.cos(angle), math.sin(angle)
    return [((cx + ca * px - sa * py) * SS, (cy + sa * px + ca * py) * SS) for px, py in zip(x, y)]


def to_fill(colour: np.ndarray) -> tuple[int, int, int]:
    return tuple(int(round(c)) for c in colour)


# --------------------------------------------------------------------------
# motifs: each draws a supersampled float RGB canvas of (h*SS, w*SS, 3)


def motif_stripes(w, h, s, pal, rng):
    xx, yy = coords(w, h)
    v = xx if rng.random() < 0.7 else yy
    colours = [pal.bg, pal.main, pal.bg, pal.second, pal.accent, pal.second][: rng.integers(4, 7)]
    widths = rng.uniform(0.12, 0.55, len(colours)) * s
    widths[0] *= 2.0  # a dominant ground band keeps it reading as stripes, not noise
    return bands(v + rng.uniform(0, s), widths, colours)


def motif_gingham(w, h, s, pal, rng):
    xx, yy = coords(w, h)
    ink = pal.main if rng.random() < 0.6 else pal.second
    ox, oy = rng.uniform(0, s, 2)
    across = np.mod(yy + oy, s) < s / 2
    down = np.mod(xx + ox, s) < s / 2
    canvas = solid(w, h, pal.bg)
    canvas[across ^ down] = mix(pal.bg, ink, 0.5)
    canvas[across & down] = ink
    return canvas


def motif_polka(w, h, s, pal, rng):
    xx, yy = coords(w, h)
    canvas = solid(w, h, pal.bg)
    radius = s * rng.uniform(0.16, 0.28)
    row = np.floor(yy / s)
    lx = np.mod(xx - np.mod(row, 2) * s / 2, s) - s / 2  # half-drop: odd rows shift by half a repeat
    ly = np.mod(yy, s) - s / 2
    paint(canvas, inside(radius - np.hypot(lx, ly)), pal.main)
    if rng.random() < 0.5:
        # small secondary dots halfway between neighbours in a row
        gx = np.mod(lx, s) - s / 2
        paint(canvas, inside(radius * 0.35 - np.hypot(gx, ly)), pal.accent)
    return canvas


def motif_chevron(w, h, s, pal, rng):
    xx, yy = coords(w, h)
    tri = np.abs(np.mod(xx / s, 1.0) - 0.5) * 2
    v = yy + s * rng.uniform(0.3, 0.55) * tri
    colours = [pal.main, pal.bg, pal.second, pal.bg]
    widths = np.array([0.3, 0.25, 0.18, 0.25]) * s * rng.uniform(0.8, 1.2)
    return bands(v, widths, colours)


def motif_floral(w, h, s, pal, rng):
    img = Image.new("RGB", (w * SS, h * SS), to_fill(pal.bg))
    draw = ImageDraw.Draw(img)
    step = s * 1.5
    petals = int(rng.choice([5, 6, 8]))
    for j in range(-1, int(h / (step * 0.87)) + 2):
        for i in range(-1, int(w / step) + 2):
            cx = (i + 0.5 * (j % 2)) * step + rng.uniform(-0.12, 0.12) * step
            cy = j * step * 0.87 + rng.uniform(-0.12, 0.12) * step
            length = s * 0.5 * rng.uniform(0.85, 1.1)
            turn = rng.uniform(0, 2 * np.pi)
            petal, centre = (pal.accent, pal.main) if (i + 2 * j) % 3 == 0 else (pal.main, pal.accent)
            for k in (0, 1):  # two leaves, drawn first so petals overlap them
                ang = turn + np.pi / petals + k * np.pi
                lx, ly = cx + math.cos(ang) * length * 0.9, cy + math.sin(ang) * length * 0.9
                draw.polygon(ellipse_points(lx, ly, length * 0.55, length * 0.2, ang), fill=to_fill(pal.second))
            for k in range(petals):
                ang = turn + 2 * np.pi * k / petals
                px, py = cx + math.cos(ang) * length * 0.5, cy + math.sin(ang) * length * 0.5
                draw.polygon(ellipse_points(px, py, length * 0.5, length * 0.22, ang), fill=to_fill(petal))
            r = length * 0.22
            draw.ellipse([(cx - r) * SS, (cy - r) * SS, (cx + r) * SS, (cy + r) * SS], fill=to_fill(centre))
    return np.asarray(img, dtype=np.float64)


def motif_waves(w, h, s, pal, rng):
    xx, yy = coords(w, h)
    wavelength = s * rng.uniform(1.5, 2.5)
    v = yy + s * 0.35 * np.sin(2 * np.pi * xx / wavelength + rng.uniform(0, 6.3))
    v += s * 0.08 * np.sin(2 * np.pi * xx / (wavelength / 3))
    colours = [pal.bg, pal.main, pal.bg, pal.accent, pal.second]
    widths = rng.uniform(0.1, 0.35, len(colours)) * s
    return bands(v, widths, colours)


def motif_hexagon(w, h, s, pal, rng):
    xx, yy = coords(w, h)
    size = s / 2  # circumradius of a pointy-top hexagon
    fq = (math.sqrt(3) / 3 * xx - yy / 3) / size
    fr = (2 / 3 * yy) / size
    # cube rounding: snap fractional axial coords to the nearest hexagon centre
    fs = -fq - fr
    q, r, c = np.round(fq), np.round(fr), np.round(fs)
    dq, dr, dc = np.abs(q - fq), np.abs(r - fr), np.abs(c - fs)
    fix_q = (dq > dr) & (dq > dc)
    fix_r = ~fix_q & (dr > dc)
    q = np.where(fix_q, -r - c, q)
    r = np.where(fix_r, -q - c, r)
    dx = xx - size * math.sqrt(3) * (q + r / 2)
    dy = yy - size * 1.5 * r
    inradius = size * math.sqrt(3) / 2
    edge = inradius - np.maximum.reduce(
        [np.abs(dx), np.abs(0.5 * dx + math.sqrt(3) / 2 * dy), np.abs(0.5 * dx - math.sqrt(3) / 2 * dy)]
    )
    tones = np.array([pal.bg, pal.main, mix(pal.main, pal.bg, 0.5)])
    canvas = tones[np.mod(q - r, 3).astype(int)]
    line = s * rng.uniform(0.03, 0.07)
    paint(canvas, inside(line - edge), pal.second if rng.random() < 0.5 else pal.accent)
    return canvas


def motif_marbling(w, h, s, pal, rng):
    xx, yy = coords(w, h)
    drift = smooth_noise(w, h, s * 3, rng)
    swirl = smooth_noise(w, h, s * 1.5, rng)
    u = (xx + s * 2.5 * drift) / (s * 1.6) + 0.35 * np.sin(2 * np.pi * yy / (s * 3) + 4 * swirl)
    t = np.mod(u, 1.0)
    stops = [0.0, 0.42, 0.5, 0.6, 0.63, 0.66, 0.76, 1.0]
    ramp = [pal.bg, pal.bg, pal.accent, pal.main, pal.second, pal.main, pal.bg, pal.bg]
    return np.stack([np.interp(t, stops, [c[k] for c in ramp]) for k in range(3)], axis=-1)


def motif_herringbone(w, h, s, pal, rng):
    xx, yy = coords(w, h)
    col = np.floor(xx / s)
    local = xx - col * s
    direction = np.where(np.mod(col, 2) == 0, 1.0, -1.0)
    v = yy + direction * local + np.mod(col, 2) * s / 6  # the offset makes the characteristic break
    light = mix(pal.main, pal.bg, 0.55)
    return bands(v, [s / 3 * 0.55, s / 3 * 0.45], [pal.main, light])


def motif_plaid(w, h, s, pal, rng):
    xx, yy = coords(w, h)
    options = [pal.bg, pal.main, pal.second, pal.accent]
    n = int(rng.integers(4, 7))
    picks, last = [], -1
    for _ in range(n):
        k = int(rng.choice([i for i in range(4) if i != last]))
        picks.append(k)
        last = k
    widths = list(rng.uniform(0.05, 0.3, n))
    # tartan setts are symmetric: mirror the stripe sequence about its last stripe
    picks += picks[-2:0:-1]
    widths += widths[-2:0:-1]
    widths = np.array(widths) / sum(widths) * s * 2.2
    colours = [options[k] for k in picks]
    warp = bands(xx + rng.uniform(0, s), widths, colours)
    weft = bands(yy + rng.uniform(0, s), widths, colours)
    thread = 1.5
    twill = np.mod(np.floor(xx / thread) + np.floor(yy / thread), 4) < 2
    return np.where(twill[..., None], warp, weft)


def paisley_outline(curl: float, n: int = 64) -> np.ndarray:
    """Unit teardrop (bulb near x=-0.4, tip at x=1) with its tip bent round."""
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    x, y = np.cos(t), np.sin(t) * np.sin(t / 2) ** 2
    pts = np.stack([x + 0.4, y], axis=1)
    bend = curl * np.clip((x + 0.2) / 1.2, 0, None) ** 2
    cb, sb = np.cos(bend), np.sin(bend)
    return np.stack([cb * pts[:, 0] - sb * pts[:, 1], sb * pts[:, 0] + cb * pts[:, 1]], axis=1) - [0.4, 0]


def motif_paisley(w, h, s, pal, rng):
    img = Image.new("RGB", (w * SS, h * SS), to_fill(pal.bg))
    draw = ImageDraw.Draw(img)
    step = s * 1.25
    outline = paisley_outline(rng.uniform(0.5, 0.9))
    # outward normals, so the dot ring follows the outline at a constant distance
    tangent = np.roll(outline, -1, axis=0) - np.roll(outline, 1, axis=0)
    normal = np.stack([tangent[:, 1], -tangent[:, 0]], axis=1)
    normal /= np.linalg.norm(normal, axis=1, keepdims=True)
    if np.mean(np.sum(normal * (outline - outline.mean(axis=0)), axis=1)) < 0:
        normal = -normal
    ring = outline + 0.14 * normal

    def place(pts, cx, cy, size, angle, dx=0.0):
        ca, sa = math.cos(angle), math.sin(angle)
        p = (pts + [dx, 0]) * size
        return [((cx + ca * x - sa * y) * SS, (cy + sa * x + ca * y) * SS) for x, y in p]

    for j in range(-1, int(h / step) + 2):
        for i in range(-1, int(w / step) + 2):
            cx = (i + 0.5 * (j % 2)) * step
            cy = j * step
            size = s * 0.55 * rng.uniform(0.9, 1.05)
            angle = rng.uniform(-0.3, 0.3) + (np.pi if (i + j) % 2 else 0.0) - 0.6
            for k in range(0, len(outline), 4):  # a ring of small dots, as block printers add
                dot = place(ring[k : k + 1], cx, cy, size, angle)[0]
                rr = size * 0.045 * SS
                draw.ellipse([dot[0] - rr, dot[1] - rr, dot[0] + rr, dot[1] + rr], fill=to_fill(pal.accent))
            draw.polygon(place(outline, cx, cy, size, angle), fill=to_fill(pal.second))
            draw.polygon(place(outline * 0.75, cx, cy, size, angle, -0.1), fill=to_fill(pal.main))
            draw.polygon(place(outline * 0.42, cx, cy, size, angle, -0.25), fill=to_fill(pal.accent))
            eye = place(np.array([[-0.5, 0.0]]), cx, cy, size, angle)[0]
            rr = size * 0.12 * SS
            draw.ellipse([eye[0] - rr, eye[1] - rr, eye[0] + rr, eye[1] + rr], fill=to_fill(pal.bg))
    return np.asarray(img, dtype=np.float64)


# motif name: (drawing function, base repeat in output px at scale "small")
MOTIFS = {
    "stripes": (motif_stripes, 36),
    "gingham": (motif_gingham, 24),
    "polka": (motif_polka, 30),
    "chevron": (motif_chevron, 36),
    "floral": (motif_floral, 48),
    "waves": (motif_waves, 40),
    "hexagon": (motif_hexagon, 30),
    "marbling": (motif_marbling, 36),
    "herringbone": (motif_herringbone, 20),
    "plaid": (motif_plaid, 52),
    "paisley": (motif_paisley, 56),
}


# --------------------------------------------------------------------------
# fabric look


def smooth_1d(n: int, sigma: float, rng: np.random.Generator) -> np.ndarray:
    radius = int(3 * sigma) + 1
    kernel = np.exp(-0.5 * (np.arange(-radius, radius + 1) / sigma) ** 2)
    line = np.convolve(rng.normal(0, 1, n + 2 * radius), kernel / kernel.sum(), mode="valid")
    return line / (line.std() + 1e-9)


def woven(canvas: np.ndarray, rng: np.random.Generator, strength: float) -> np.ndarray:
    """Thread irregularity, a faint twill grain and scanner noise on an RGB array."""
    h, w, _ = canvas.shape
    rows = smooth_1d(h, 1.2, rng)[:, None]
    cols = smooth_1d(w, 1.2, rng)[None, :]
    grain = np.where(np.mod(np.arange(h)[:, None] + np.arange(w)[None, :], 3) == 0, -1.0, 0.5)
    yy, xx = np.mgrid[0:h, 0:w]
    # scanners light the middle of the glass a little more than the edges
    falloff = 1 - 0.05 * (((xx - w / 2) / w) ** 2 + ((yy - h / 2) / h) ** 2) * 4
    gain = (1 + strength * (0.018 * rows + 0.018 * cols + 0.012 * grain)) * falloff
    out = canvas * gain[..., None] + rng.normal(0, 1.4 * strength, canvas.shape)
    return np.clip(np.round(out), 0, 255).astype(np.uint8)


def render_swatch(motif: str, colourway: str, scale: str, size, rng, texture: float = 1.0) -> Image.Image:
    draw, base = MOTIFS[motif]
    w, h = size
    repeat = base * SCALES[scale] * rng.uniform(0.88, 1.12)
    canvas = draw(w, h, repeat, Palette.named(colourway), rng)
    big = Image.fromarray(np.clip(np.round(canvas), 0, 255).astype(np.uint8), "RGB")
    small = np.asarray(big.resize((w, h), Image.LANCZOS), dtype=np.float64)
    return Image.fromarray(woven(small, rng, texture), "RGB")


# --------------------------------------------------------------------------
# metadata


def exif_bytes(when: datetime, model: str) -> bytes:
    exif = Image.Exif()
    exif[0x010F] = SCANNER_MAKE  # Make
    exif[0x0110] = model  # Model
    exif.get_ifd(0x8769)[0x9003] = when.strftime("%Y:%m:%d %H:%M:%S")  # DateTimeOriginal
    return exif.tobytes()


def xmp_bytes(title: str, keywords: list[str]) -> bytes:
    items = "".join(f"<rdf:li>{escape(k)}</rdf:li>" for k in keywords)
    packet = (
        '<?xpacket begin="\ufeff" id="W5M0MpCehiHzreSzNTczkc9d"?>\n'
        '<x:xmpmeta xmlns:x="adobe:ns:meta/">\n'
        ' <rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#">\n'
        '  <rdf:Description rdf:about="" xmlns:dc="http://purl.org/dc/elements/1.1/">\n'
        f'   <dc:title><rdf:Alt><rdf:li xml:lang="x-default">{escape(title)}</rdf:li></rdf:Alt></dc:title>\n'
        f"   <dc:subject><rdf:Bag>{items}</rdf:Bag></dc:subject>\n"
        "  </rdf:Description>\n"
        " </rdf:RDF>\n"
        "</x:xmpmeta>\n"
        '<?xpacket end="w"?>'
    )
    return packet.encode("utf-8")


def encode(img: Image.Image, fmt: str, quality: int = 85, exif: bytes | None = None, xmp: bytes | None = None) -> bytes:
    buf = io.BytesIO()
    if fmt == "jpg":
        extra = {}
        if exif:
            extra["exif"] = exif
        if xmp:
            extra["xmp"] = xmp
        img.save(buf, "JPEG", quality=quality, optimize=True, dpi=(300, 300), **extra)
    elif fmt == "png":
        img.save(buf, "PNG", dpi=(300, 300))
    elif fmt == "webp":
        img.save(buf, "WEBP", quality=86, method=4)
    elif fmt == "tif":
        img.save(buf, "TIFF", compression="tiff_adobe_deflate", dpi=(300, 300))
    else:
        raise ValueError(fmt)
    return buf.getvalue()


# --------------------------------------------------------------------------
# planning the archive


@dataclass
class Entry:
    path: str
    kind: str
    when: datetime
    data: bytes = b""
    source: str = ""
    motif: str = ""
    colourway: str = ""
    notes: str = ""
    extra: dict = field(default_factory=dict)


def slug(text: str) -> str:
    return text.replace(" and ", "-").replace(" ", "-")


def work_times(first: str, last: str, n: int, rng: np.random.Generator) -> list[datetime]:
    """n sorted weekday office-hours moments between two dates (UTC)."""
    start = datetime.fromisoformat(first).replace(tzinfo=timezone.utc)
    span = (datetime.fromisoformat(last) - datetime.fromisoformat(first)).days + 1
    out = []
    for day in sorted(rng.integers(0, span, n)):
        d = start + timedelta(days=int(day))
        d += timedelta(days=(7 - d.weekday()) % 7 if d.weekday() >= 5 else 0)
        out.append(d + timedelta(hours=int(rng.integers(9, 17)), minutes=int(rng.integers(0, 60)), seconds=int(rng.integers(0, 60))))
    return sorted(out)


def child_rng(seed: int, *keys: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([seed, *keys]))


def plan_originals(seed: int) -> list[Entry]:
    rng = child_rng(seed, 1)
    combos = [(m, c, s) for m in MOTIFS for c in COLOURWAYS for s in SCALES]
    order = rng.permutation(len(combos))
    n = len(combos)
    fmt_of = {}
    special = rng.permutation(n)[: N_PNG + N_WEBP + N_TIFF]
    for k, idx in enumerate(special):
        fmt_of[int(idx)] = "png" if k < N_PNG else "webp" if k < N_PNG + N_WEBP else "tif"
    entries = []
    for s_index, (chunk, (folder, code, first, last)) in enumerate(zip(np.array_split(order, len(SEASONS)), SEASONS)):
        times = work_times(first, last, len(chunk), rng)
        for number, (idx, when) in enumerate(zip(chunk, times), start=1):
            motif, colourway, scale = combos[int(idx)]
            fmt = fmt_of.get(int(idx), "jpg")
            frame = FRAMES[int(rng.choice(len(FRAMES), p=[p for _, p in FRAMES]))][0]
            name = f"{code}-{number:03d}_{motif}_{slug(colourway)}_{scale}.{fmt}"
            # the studio bought its scanner after the first season; earlier files are design exports
            has_exif = fmt == "jpg" and s_index > 0 and rng.random() < 0.7
            has_xmp = fmt == "jpg" and rng.random() < 0.3
            entries.append(
                Entry(
                    path=f"{folder}/{name}",
                    kind="original",
                    when=when,
                    motif=motif,
                    colourway=colourway,
                    extra=dict(fmt=fmt, frame=frame, scale=scale, season=folder, exif=has_exif, xmp=has_xmp, seed_key=int(idx)),
                )
            )
    return entries


def render_original(e: Entry, seed: int) -> None:
    x = e.extra
    rng = child_rng(seed, 2, x["seed_key"])
    # lossless exports came straight from the design software, so carry less scanner grain
    texture = 1.0 if x["fmt"] in ("jpg", "webp") else 0.35
    img = render_swatch(e.motif, e.colourway, x["scale"], x["frame"], rng, texture)
    exif = exif_bytes(e.when - timedelta(minutes=3), "FB-1") if x["exif"] else None
    xmp = None
    if x["xmp"]:
        title = f"{e.motif.capitalize()}, {e.colourway}, {x['scale']} repeat"
        xmp = xmp_bytes(title, [e.motif, e.colourway, x["season"], f"{x['scale']} repeat", "swatch"])
    e.data = encode(img, x["fmt"], exif=exif, xmp=xmp)
    notes = [x["scale"], f"{x['frame'][0]}x{x['frame'][1]}"]
    notes += ["exif"] if exif else []
    notes += ["xmp"] if xmp else []
    e.notes = "; ".join(notes)
    e.extra["image"] = img


def rescan(src: Entry, rng: np.random.Generator) -> tuple[int, Image.Image, str]:
    """Re-scan a swatch: some combination of crop, skew, lighting and a cheap JPEG."""
    img = Image.open(io.BytesIO(src.data)).convert("RGB")
    ops = [op for op in ("crop", "rotate", "light", "jpeg") if rng.random() < 0.65]
    while len(ops) < 2:
        extra = ["crop", "rotate", "light", "jpeg"][int(rng.integers(0, 4))]
        if extra not in ops:
            ops.append(extra)
    ops = [op for op in ("crop", "rotate", "light", "jpeg") if op in ops]
    notes = []
    if "crop" in ops:
        keep = rng.uniform(0.80, 0.90)
        w, h = img.size
        cw, ch = round(w * keep), round(h * keep)
        left, top = int(rng.integers(0, w - cw + 1)), int(rng.integers(0, h - ch + 1))
        img = img.crop((left, top, left + cw, top + ch))
        notes.append(f"crop {keep:.0%}")
    if "rotate" in ops:
        angle = float(rng.uniform(1.5, 5.0) * rng.choice([-1, 1]))
        img = img.rotate(angle, resample=Image.BICUBIC, expand=True, fillcolor=SCANNER_BED)
        notes.append(f"rotate {angle:+.1f} deg")
    if "light" in ops:
        bright, contrast = rng.uniform(0.82, 1.18), rng.uniform(0.85, 1.15)
        tint = rng.uniform(0.03, 0.08)
        warm = rng.random() < 0.5
        balance = np.array([1 + tint, 1.0, 1 - tint]) if warm else np.array([1 - tint, 1.0, 1 + tint])
        a = np.asarray(img, dtype=np.float64)
        a = ((a - 128) * contrast + 128) * bright * balance
        img = Image.fromarray(np.clip(np.round(a), 0, 255).astype(np.uint8), "RGB")
        notes.append(f"lighting (brightness {bright:.2f}, contrast {contrast:.2f}, {'warm' if warm else 'cool'} {tint:.2f})")
    quality = int(rng.integers(55, 73)) if "jpeg" in ops else 90
    if "jpeg" in ops:
        notes.append(f"jpeg q{quality}")
    return quality, img, "; ".join(notes)


def plan_derived(originals: list[Entry], seed: int) -> list[Entry]:
    rng = child_rng(seed, 3)
    picks = rng.permutation(len(originals))
    rescan_src = [originals[int(i)] for i in picks[:N_RESCANS]]
    # proofs went out as JPEG or PNG; the client portal would not take the rest
    copy_pool = [originals[int(i)] for i in picks[N_RESCANS:] if originals[int(i)].extra["fmt"] in ("jpg", "png")]
    copy_src = copy_pool[:N_COPIES]
    out = []

    for n, (src, when) in enumerate(zip(copy_src, work_times(*PROOFS_DATES, N_COPIES, rng)), start=1):
        ext = src.path.rsplit(".", 1)[1]
        out.append(Entry(f"{PROOFS_DIR}/proof-{n:02d}.{ext}", "copy", when, src.data, src.path, src.motif, src.colourway, "exact byte copy"))

    times = work_times(*RESCANS_DATES, N_RESCANS, rng)
    for n, (src, when) in enumerate(zip(rescan_src, times), start=1):
        quality, img, notes = rescan(src, rng)
        data = encode(img, "jpg", quality=quality, exif=exif_bytes(when - timedelta(minutes=2), "FB-2"))
        out.append(Entry(f"{RESCANS_DIR}/scan-{n:04d}.jpg", "rescan", when, data, src.path, src.motif, src.colourway, notes))

    t_empty, t_cut, t_text = work_times(*INBOX_DATES, 3, rng)
    victim = next(e for e in originals[::-1] if e.extra["fmt"] == "jpg")
    cut = victim.data[: int(len(victim.data) * 0.4)]
    text = (
        "Colour notes for the next range\n"
        "- pull the rust a little warmer\n"
        "- sea glass ground is too cold on the linen base\n"
        "(saved with the wrong extension by the upload form)\n"
    ).encode("utf-8")
    out += [
        Entry(f"{INBOX_DIR}/upload-0417.jpg", "broken", t_empty, b"", notes="zero-byte file"),
        Entry(f"{INBOX_DIR}/upload-0418.jpg", "broken", t_cut, cut, notes=f"truncated JPEG: first 40% of the bytes of {victim.path}"),
        Entry(f"{INBOX_DIR}/upload-0419.png", "broken", t_text, text, notes="plain text with a .png name"),
    ]
    return out


def readme_text(entries: list[Entry]) -> str:
    count = {}
    for e in entries:
        top = e.path.split("/")[0]
        count[top] = count.get(top, 0) + 1
    seasons = ", ".join(f"`{f}/` ({count[f]})" for f, *_ in SEASONS)
    return f"""# Demo archive: the {STUDIO}

The {STUDIO} is an invented small textile studio; this folder is its
pattern library, drawn procedurally so kinscope has something realistic to index and
search. Every swatch is one motif (stripes, gingham, polka dots, chevron,
floral, waves, hexagons, marbling, herringbone, plaid, paisley) in one of ten
colourways and a small or large repeat, with a little woven texture so it looks
like a fabric scan. Nothing here depicts real people, places or products.

- {seasons}:
  the original swatches, filed by season; mostly JPEG, with a few PNG, WebP and
  one TIFF. Some JPEGs carry EXIF (scanner make/model, date taken) and an XMP
  title and keywords.
- `{RESCANS_DIR}/` ({count[RESCANS_DIR]}): re-scans of existing swatches, cropped, skewed on
  the scanner bed, relit and/or re-encoded at a lower JPEG quality.
- `{PROOFS_DIR}/` ({count[PROOFS_DIR]}): exact byte copies of swatches sent to clients.
- `{INBOX_DIR}/` ({count[INBOX_DIR]}): broken uploads (an empty file, a truncated JPEG, a text
  file named `.png`) to show how failures are reported.
- `{KEY_NAME}`: the answer key (`{",".join(KEY_FIELDS)}`);
  `source` names the original a re-scan or copy came from, `modified` the file's
  modification time (git does not keep it: `python scripts/demo_dates.py` sets it
  again, and `scripts/demo` does so before indexing).

Regenerate with `python scripts/make_demo_archive.py` (deterministic; it only
replaces files listed in its own `{KEY_NAME}`).
"""


# --------------------------------------------------------------------------
# writing safely


def owned_files(out: Path) -> set[Path]:
    """Files a previous run wrote, read from its key; empty if there was none."""
    key = out / KEY_NAME
    if not key.is_file():
        return set()
    with key.open(newline="", encoding="utf-8") as f:
        reader = csv.DictReader(f)
        if reader.fieldnames not in (KEY_FIELDS, OLD_KEY_FIELDS):
            return set()
        listed = {out / row["path"] for row in reader}
    return listed | {key, out / README_NAME}


def previous_output(out: Path) -> set[Path]:
    """Files in `out` from an earlier run; exits if anything else is there."""
    if not out.exists():
        return set()
    if not out.is_dir():
        sys.exit(f"error: {out} exists and is not a folder")
    present = {p for p in out.rglob("*") if p.is_file() or p.is_symlink()}
    if not present:
        return set()
    owned = owned_files(out)
    foreign = sorted(present - owned)
    if foreign:
        shown = "\n  ".join(str(p.relative_to(out)) for p in foreign[:10])
        sys.exit(
            f"error: {out} holds {len(foreign)} file(s) this script did not create, e.g.\n  {shown}\n"
            "Move them away or pick another --out."
        )
    return present


def remove_previous(out: Path, present: set[Path]) -> None:
    for p in present:
        p.unlink()
    # only folders that held our files, deepest first, and only once empty
    for d in sorted({p.parent for p in present} - {out}, key=lambda p: len(p.parts), reverse=True):
        while d != out and d.is_dir() and not any(d.iterdir()):
            d.rmdir()
            d = d.parent


def stamp(when: datetime) -> float:
    return when.timestamp()


def write_archive(out: Path, entries: list[Entry]) -> None:
    out.mkdir(parents=True, exist_ok=True)
    latest: dict[Path, float] = {}
    for e in entries:
        path = out / e.path
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(e.data)
        os.utime(path, (stamp(e.when), stamp(e.when)))
        latest[path.parent] = max(latest.get(path.parent, 0.0), stamp(e.when))

    done = datetime.fromisoformat(KEY_DATE).replace(hour=16, minute=40, tzinfo=timezone.utc)
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(KEY_FIELDS)
    for e in entries:
        writer.writerow([e.path, e.kind, e.source, e.motif, e.colourway, e.notes, e.when.isoformat()])
    for name, text in ((KEY_NAME, buf.getvalue()), (README_NAME, readme_text(entries))):
        (out / name).write_text(text, encoding="utf-8", newline="\n")
        os.utime(out / name, (stamp(done), stamp(done)))
    for d, t in latest.items():
        os.utime(d, (t, t))
    os.utime(out, (stamp(done), stamp(done)))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help=f"output folder (default: {DEFAULT_OUT})")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"random seed (default: {DEFAULT_SEED})")
    args = parser.parse_args(argv)

    started = time.perf_counter()
    out = args.out.resolve()
    previous = previous_output(out)  # before the slow part, so a refusal comes at once
    originals = plan_originals(args.seed)
    for e in originals:
        render_original(e, args.seed)
    entries = originals + plan_derived(originals, args.seed)

    remove_previous(out, previous)
    write_archive(out, entries)

    kinds = {}
    for e in entries:
        kinds[e.kind] = kinds.get(e.kind, 0) + 1
    total = sum(len(e.data) for e in entries)
    summary = ", ".join(f"{n} {k}" for k, n in kinds.items())
    print(f"wrote {len(entries)} files ({summary}), {total / 1e6:.1f} MB, to {out} in {time.perf_counter() - started:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
