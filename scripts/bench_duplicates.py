#!/usr/bin/env python3
"""Benchmark of near-duplicate grouping against a perceptual-hash baseline (pHash from `imagehash`).

The labelled set is built here from open images shipped by packages: scikit-image's bundled images
(`skimage.data`, the ones that need no download) and scikit-learn's `load_sample_images`, plus
procedurally generated distractors. Every original gets transformed copies of the kinds used in
copy-detection benchmarks (JPEG, crops, resizing, rotations, colour shifts, grayscale, flips, a caption
or a border). All files are indexed into one kinscope archive, then, for each transformation family,
the grouping runs on the originals + that family's copies + the distractors, and pairwise precision,
recall and F1 are counted (a pair is right when both items come from the same original).
pHash is measured on the same files in the same run, grouped by the same star rule.

    .venv/bin/python scripts/bench_duplicates.py                 # the table in docs/duplicates.md
    .venv/bin/python scripts/bench_duplicates.py --sweep         # + the calibration sweep
    .venv/bin/python scripts/bench_duplicates.py --workdir /tmp/kdup   # keep (and reuse) the files and archive

Needs the `bench` extra (`pip install -e '.[bench]'`) for imagehash, and scikit-image / scikit-learn.
"""
from __future__ import annotations

import argparse
import json
import math
import sys
import tempfile
from itertools import combinations
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageEnhance, ImageFont, ImageOps

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from index.duplicates import groups as dup  # noqa: E402
from index.api import Archive  # noqa: E402

SEED = 20260211
N_DISTRACTORS = 400
EXPORT_QUALITY = 90  # every copy outside the JPEG family is saved as a JPEG at this quality (a usual export)
PHASH_THRESHOLDS = (6, 10)  # Hamming distance out of 64 bits; "common practice" values for pHash duplicates

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


# --- evaluation ------------------------------------------------------------------------------------------
def clusters_from_doc(doc: dict) -> list[set[int]]:
    """What a reviewer sees: groups joined where an exact group's keeper is a member of a near group."""
    parent: dict[int, int] = {}

    def find(a):
        while parent.setdefault(a, a) != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        return a

    for g in doc["groups"]:
        ids = [m["id"] for m in g["members"]]
        for other in ids[1:]:
            parent[find(other)] = find(ids[0])
    out: dict[int, set[int]] = {}
    for a in parent:
        out.setdefault(find(a), set()).add(a)
    return [c for c in out.values() if len(c) > 1]


def pair_counts(clusters: list[set[int]], source: dict[int, str | None], members: list[int]) -> tuple[int, int, int]:
    """(true positive, false positive, false negative) pairs among `members`."""
    predicted = {tuple(sorted(p)) for c in clusters for p in combinations(sorted(c), 2)}
    by_source: dict[str, list[int]] = {}
    for m in members:
        if source[m] is not None:
            by_source.setdefault(source[m], []).append(m)
    truth = {p for ids in by_source.values() for p in combinations(sorted(ids), 2)}
    tp = len(predicted & truth)
    return tp, len(predicted) - tp, len(truth) - tp


def prf(tp: int, fp: int, fn: int) -> tuple[float, float, float]:
    p = tp / (tp + fp) if tp + fp else 1.0
    r = tp / (tp + fn) if tp + fn else 1.0
    f = 2 * p * r / (p + r) if p + r else 0.0
    return p, r, f


def phash_bits(paths: list[str]) -> np.ndarray:
    import imagehash

    out = np.zeros((len(paths), 64), bool)
    for n, p in enumerate(paths):
        with Image.open(p) as im:
            out[n] = imagehash.phash(im.convert("RGB")).hash.ravel()
    return out


def phash_clusters(bits: np.ndarray, ids: np.ndarray, max_distance: int) -> list[set[int]]:
    """pHash pairs with Hamming distance <= max_distance, grouped by the same star rule as ours."""
    x = bits.astype(np.int32)
    dist = x.shape[1] - (x @ x.T + (1 - x) @ (1 - x).T)  # Hamming distance between every two hashes
    i, j = np.nonzero(np.triu(dist <= max_distance, 1))
    score = 1.0 - dist[i, j] / x.shape[1]
    return [set(ids[m].tolist()) for _, m in dup.star_groups(len(ids), i, j, score.astype(np.float32))]


# --- the run ----------------------------------------------------------------------------------------------
def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--workdir", type=Path, help="Keep the set and the archive here (reused when present).")
    ap.add_argument("--distractors", type=int, default=N_DISTRACTORS)
    ap.add_argument("--seed", type=int, default=SEED)
    ap.add_argument("--layer", default=dup.DEFAULT_LAYER)
    ap.add_argument("--threshold", type=float, help="Default: the calibrated threshold of the layer.")
    ap.add_argument("--raw", action="store_true", help="Threshold raw cosine similarity instead of the normalised score.")
    ap.add_argument("--sweep", action="store_true", help="Also print the calibration sweep (layers x thresholds).")
    args = ap.parse_args()
    if args.workdir:
        args.workdir.mkdir(parents=True, exist_ok=True)
        run(args, args.workdir)
    else:
        with tempfile.TemporaryDirectory(prefix="kinscope-bench-") as tmp:
            run(args, Path(tmp))


def run(args, work: Path) -> None:
    labels = build_set(work / "set", args.distractors, args.seed)
    db = work / "db"
    archive = Archive.open(db, create=True)
    report = archive.add([work / "set"], progress=sys.stderr.isatty())
    print(f"set: {sum(l['family'] is None and l['source'] is not None for l in labels)} originals, "
          f"{sum(l['family'] is not None for l in labels)} copies, {sum(l['source'] is None for l in labels)} distractors; "
          f"indexed {report['embedded']} new, {report['unchanged']} unchanged")
    rows = {r["id"]: r for r in archive.catalog.db.query(
        f"select {', '.join(dup.ROW_COLUMNS)} from images where status = 'ok'")}
    by_path = {r["path"]: i for i, r in rows.items()}
    labels = [l for l in labels if l["path"] in by_path]
    for l in labels:
        l["id"] = by_path[l["path"]]
    source = {l["id"]: l["source"] for l in labels}
    layers = archive.layer_names
    vectors = {}
    for layer in layers:
        ids, v = dup.all_vectors(archive.store(layer))
        pos = {int(i): n for n, i in enumerate(ids)}
        vectors[layer] = v[[pos[l["id"]] for l in labels]]
    label_ids = np.array([l["id"] for l in labels], np.int64)
    bits = phash_bits([l["path"] for l in labels])

    def subset(family: str) -> np.ndarray:
        return np.array([n for n, l in enumerate(labels) if l["family"] in (None, family)])

    threshold = args.threshold if args.threshold is not None else dup.DEFAULT_THRESHOLDS[args.layer]
    normalised = not args.raw
    floor = dup.MIN_COSINE.get(args.layer) if normalised else None
    print(f"ours: layer {args.layer}, {'normalised score' if normalised else 'cosine'} >= {threshold}"
          + (f" and cosine >= {floor}" if floor is not None else "") + "; "
          f"pHash: imagehash.phash (64 bits), Hamming <= {' and <= '.join(map(str, PHASH_THRESHOLDS))}; "
          "pairwise precision / recall / F1 of the groups")
    head = f"{'family':<16} {'pairs':>5} | {'ours P':>6} {'R':>5} {'F1':>5}"
    for t in PHASH_THRESHOLDS:
        head += f" | {'pH<=' + str(t) + ' P':>8} {'R':>5} {'F1':>5}"
    print(head)
    print("-" * len(head))
    totals = {key: {"standard": np.zeros(3, int), "all": np.zeros(3, int)} for key in ("ours", *PHASH_THRESHOLDS)}
    for family in TRANSFORMS:
        sel = subset(family)
        members = label_ids[sel].tolist()
        doc = dup.find(label_ids[sel], vectors[args.layer][sel], [rows[int(i)] for i in label_ids[sel]],
                       threshold=threshold, normalised=normalised, min_cosine=floor, layer=args.layer)
        counts = {"ours": pair_counts(clusters_from_doc(doc), source, members)}
        for t in PHASH_THRESHOLDS:
            counts[t] = pair_counts(phash_clusters(bits[sel], label_ids[sel], t), source, members)
        line = f"{family:<16} {sum(counts['ours'][::2]):>5} |"
        for key, c in counts.items():
            p, r, f = prf(*c)
            line += f" {p:>{6 if key == 'ours' else 8}.3f} {r:>5.3f} {f:>5.3f} |"
            totals[key]["all"] += c
            if family in STANDARD_FAMILIES:
                totals[key]["standard"] += c
        print(line.rstrip(" |"))
    print("-" * len(head))
    for scope in ("standard", "all"):
        name = "standard (pool)" if scope == "standard" else "all (pool)"
        line = f"{name:<16} {int(totals['ours'][scope][0] + totals['ours'][scope][2]):>5} |"
        for key in totals:
            p, r, f = prf(*totals[key][scope])
            line += f" {p:>{6 if key == 'ours' else 8}.3f} {r:>5.3f} {f:>5.3f} |"
        print(line.rstrip(" |"))
    # the shipped path end to end: every copy of every family in one archive, through Archive.duplicates
    doc = archive.duplicates(layer=args.layer, threshold=threshold, normalised=normalised)
    c = pair_counts(clusters_from_doc(doc), source, label_ids.tolist())
    p, r, f = prf(*c)
    line = f"{'one archive':<16} {c[0] + c[2]:>5} | {p:>6.3f} {r:>5.3f} {f:>5.3f}"
    for t in PHASH_THRESHOLDS:
        pp, rr, ff = prf(*pair_counts(phash_clusters(bits, label_ids, t), source, label_ids.tolist()))
        line += f" | {pp:>8.3f} {rr:>5.3f} {ff:>5.3f}"
    print(line)
    print(f"standard = every family except {', '.join(HARD_FAMILIES)} (declared before measuring); "
          "'one archive' = all copies together through Archive.duplicates, pairs between copies included")
    if args.sweep:
        sweep(labels, label_ids, vectors, rows, source, bits, subset)
    archive.close()


def sweep(labels, label_ids, vectors, rows, source, bits, subset) -> None:
    """Pooled precision/recall per layer and threshold, raw cosine and normalised score (for calibration)."""
    print("\ncalibration sweep: pooled over the standard families (std) and over all families (all); "
          f"normalised rows apply the cosine floor {dup.MIN_COSINE}")
    print(f"{'layer':<8} {'score':<10} {'T':>5} | {'std P':>6} {'R':>5} {'F1':>5} | {'all P':>6} {'R':>5} {'F1':>5}")
    grids = {"cosine": {layer: np.arange(0.90, 0.999, 0.005) for layer in vectors},
             "normalised": {"objects": np.arange(0.05, 0.405, 0.01), "parts": np.arange(0.02, 0.0905, 0.005)}}
    for layer, v in vectors.items():
        for mode in grids:
            grid = np.round(grids[mode].get(layer, np.arange(0.0, 0.0505, 0.005)), 3)
            pairs = {}
            for family in TRANSFORMS:  # every pair at the lowest threshold once; higher ones are subsets
                sel = subset(family)
                bg = dup.background(v[sel]) if mode == "normalised" else None
                floor = dup.MIN_COSINE.get(layer, -1.0) if mode == "normalised" else -1.0
                pairs[family] = (sel, dup.candidate_pairs(v[sel], float(grid[0]), bg, min_cosine=floor))
            for t in grid:
                tot = {"std": np.zeros(3, int), "all": np.zeros(3, int)}
                for family, (sel, (a, b, s, _)) in pairs.items():
                    keep = s >= t
                    groups = dup.star_groups(len(sel), a[keep], b[keep], s[keep])
                    clusters = [set(label_ids[sel][m].tolist()) for _, m in groups]
                    c = np.array(pair_counts(clusters, source, label_ids[sel].tolist()))
                    tot["all"] += c
                    if family in STANDARD_FAMILIES:
                        tot["std"] += c
                (p1, r1, f1), (p2, r2, f2) = prf(*tot["std"]), prf(*tot["all"])
                print(f"{layer:<8} {mode:<10} {t:>5.3f} | {p1:>6.3f} {r1:>5.3f} {f1:>5.3f} | {p2:>6.3f} {r2:>5.3f} {f2:>5.3f}")
    print("\npHash sweep (same pooling)")
    for t in range(2, 21, 2):
        tot = {"std": np.zeros(3, int), "all": np.zeros(3, int)}
        for family in TRANSFORMS:
            sel = subset(family)
            c = np.array(pair_counts(phash_clusters(bits[sel], label_ids[sel], t), source, label_ids[sel].tolist()))
            tot["all"] += c
            if family in STANDARD_FAMILIES:
                tot["std"] += c
        (p1, r1, f1), (p2, r2, f2) = prf(*tot["std"]), prf(*tot["all"])
        print(f"{'pHash':<8} {'hamming':<10} {t:>5d} | {p1:>6.3f} {r1:>5.3f} {f1:>5.3f} | {p2:>6.3f} {r2:>5.3f} {f2:>5.3f}")


if __name__ == "__main__":
    main()
