"""Do explanations point at the content that matched? Old and new explanations side by side.

Open images (scikit-image's bundled data, scikit-learn's sample photographs) are indexed into a fresh
archive. Copies with known geometry are made of each: a mirror image, two crops of 50-80% at random
offsets, a half-size copy and a small rotation (4-10 degrees). Each copy is explained against its
original on `parts` and `objects`:
- top-3 pairs right: each of the three first region pairs, its query cell mapped through the known
  transform, counts as right when it lands within one cell of the matched cell (cells of the grid the
  pairs come from; also at a common 1/16 of the image), out of 3 per copy (missing pairs count wrong);
- ring mass: the share of the heat map's positive mass on the outer ring of cells, beside the ring's
  share of the area;
- crop: the share of the original's heat-map mass inside the region the crop shows, beside its area.
The old explanation is the exact split of the raw cosine with pairs as products of channel marginals
(index/search/explain.py before this benchmark; reproduced below). The new one is Archive.explain. Two other
splits are printed to show why the product uses the one it does. Also: where channel exemplars sit.

    PYTHONPATH=. .venv/bin/python scripts/bench_explain.py [--seed 0] [--crops 2] [--threads 1]

About 0.25 s of CPU per explanation with one torch thread: a few minutes in all. Figures, not
assertions; see docs/explain.md.
"""
from __future__ import annotations

import argparse
import math
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from index.api import Archive  # noqa: E402
from index.search.explain_score import block_sum, descriptor, shares, split  # noqa: E402

LAYERS = ("parts", "objects")
SKIMAGE = ("astronaut", "camera", "chelsea", "coffee", "rocket", "coins", "moon", "page", "text", "horse",
           "hubble_deep_field", "immunohistochemistry", "retina", "colorwheel", "brick", "grass", "gravel", "cell",
           "clock", "logo", "microaneurysms", "checkerboard")  # skimage.data images that need no download


def open_images() -> dict[str, Image.Image]:
    from skimage import data
    from sklearn.datasets import load_sample_images

    def rgb(a):
        if a.dtype == bool:
            a = a.astype(np.uint8) * 255
        if a.dtype != np.uint8:
            a = (255 * (a - a.min()) / (np.ptp(a) + 1e-9)).astype(np.uint8)
        return Image.fromarray(a).convert("RGB")

    images = {name: rgb(getattr(data, name)()) for name in SKIMAGE}
    samples = load_sample_images()
    for path, array in zip(samples.filenames, samples.images):
        images["sklearn-" + Path(path).stem] = Image.fromarray(array)
    return images


def copies(image: Image.Image, rng, crops: int) -> list[tuple[str, Image.Image, object]]:
    """(kind, copy, f): f maps a position in the copy (fractions x, y) to the original."""
    w, h = image.size
    out = [("mirror", image.transpose(Image.FLIP_LEFT_RIGHT), lambda x, y: (1 - x, y))]
    for _ in range(crops):
        f = rng.uniform(0.5, 0.8)
        x0, y0 = rng.uniform(0, 1 - f), rng.uniform(0, 1 - f)
        box = (int(x0 * w), int(y0 * h), int((x0 + f) * w), int((y0 + f) * h))
        a, b, c, d = box[0] / w, box[1] / h, (box[2] - box[0]) / w, (box[3] - box[1]) / h
        out.append(("crop", image.crop(box), lambda x, y, a=a, b=b, c=c, d=d: (a + x * c, b + y * d)))
    out.append(("half", image.resize((max(1, w // 2), max(1, h // 2)), Image.BILINEAR), lambda x, y: (x, y)))
    angle = float(rng.choice([-1, 1]) * rng.uniform(4, 10))
    t = math.radians(angle)  # PIL turns counter-clockwise; a copy's offset (u, v) came from this one

    def unrotate(x, y):
        u, v = x * w - w / 2, y * h - h / 2
        return ((math.cos(t) * u - math.sin(t) * v + w / 2) / w, (math.sin(t) * u + math.cos(t) * v + h / 2) / h)

    out.append(("rotate", image.rotate(angle, resample=Image.BILINEAR), unrotate))
    return out


def old_pairs(fq, fd, p, n=3, max_side=8):
    """The pairs kinscope offered before: products of channel marginals of the raw-cosine split, on at
    most an 8 x 8 grid, each cell used once (index/search/explain.py `correspondences`, as it was)."""
    q, d = descriptor(fq, p), descriptor(fd, p)
    contrib = q * d
    cq, cd = block_sum(shares(fq, p).reshape(fq.shape), max_side), block_sum(shares(fd, p).reshape(fd.shape), max_side)
    c, rq, kq = cq.shape
    _, rd, kd = cd.shape
    strength = cq.reshape(c, -1).T @ (contrib[:, None] * cd.reshape(c, -1))
    out, used_q, used_d = [], set(), set()
    for flat in np.argsort(-strength, axis=None):
        i, j = divmod(int(flat), strength.shape[1])
        if i in used_q or j in used_d:
            continue
        used_q.add(i)
        used_d.add(j)
        (a, b), (e, f) = divmod(i, kq), divmod(j, kd)
        out.append({"query_cell": [(b + 0.5) / kq, (a + 0.5) / rq], "match_cell": [(f + 0.5) / kd, (e + 0.5) / rd],
                    "grid": (rd, kd)})
        if len(out) == n:
            break
    return out


def right(pairs, f, grid, tolerance=None) -> list[bool]:
    """For the first three pairs: does the query cell, mapped by f, land within one cell of the match cell?"""
    rows, cols = grid
    tx, ty = (1 / cols, 1 / rows) if tolerance is None else (tolerance, tolerance)
    ok = []
    for pair in pairs[:3]:
        x, y = f(*pair["query_cell"])
        mx, my = pair["match_cell"]
        ok.append(abs(x - mx) <= tx + 1e-9 and abs(y - my) <= ty + 1e-9)
    return ok + [False] * (3 - len(ok))


def ring_share(grid) -> tuple[float, float]:
    """Positive heat-map mass on the outer ring of cells, and the ring's share of the cells."""
    g = np.maximum(np.asarray(grid, np.float64), 0)
    ring = np.ones(g.shape, bool)
    ring[1:-1, 1:-1] = False
    return float(g[ring].sum() / max(g.sum(), 1e-12)), float(ring.mean())


def inside_share(grid, f) -> tuple[float, float]:
    """Positive heat-map mass of the original inside the region a crop shows, and that region's area."""
    g = np.maximum(np.asarray(grid, np.float64), 0)
    h, w = g.shape
    (x0, y0), (x1, y1) = f(0, 0), f(1, 1)
    r, c = np.indices(g.shape)
    inside = ((c + 0.5) / w >= x0) & ((c + 0.5) / w <= x1) & ((r + 0.5) / h >= y0) & ((r + 0.5) / h <= y1)
    return float(g[inside].sum() / max(g.sum(), 1e-12)), float(inside.mean())


def on_ring(pair, grid) -> bool:
    rows, cols = grid
    hit = []
    for x, y in (pair["query_cell"], pair["match_cell"]):
        c, r = int(x * cols), int(y * rows)
        hit.append(c == 0 or r == 0 or c == cols - 1 or r == rows - 1)
    return all(hit)


class Tally:
    def __init__(self):
        self.values: dict[str, list] = {}

    def add(self, key, values):
        self.values.setdefault(key, []).extend(values if isinstance(values, list) else [values])

    def mean(self, key) -> float:
        v = self.values.get(key, [])
        return float(np.mean(v)) if v else float("nan")


def build_archive(images, folder: Path, db: Path) -> tuple[Archive, dict[str, int]]:
    folder.mkdir()
    for name, image in images.items():
        image.save(folder / f"{name}.png")
    archive = Archive.open(db, create=True)
    archive.add([folder], progress=False)
    ids = {Path(row["path"]).stem: row["id"] for row in archive.items(limit=500)["items"]}
    return archive, ids


def run(args) -> None:
    rng = np.random.default_rng(args.seed)
    images = open_images()
    tmp = Path(tempfile.mkdtemp(prefix="bench-explain-"))
    started = time.time()
    archive, ids = build_archive(images, tmp / "archive", tmp / "db")
    import torch

    torch.set_num_threads(args.threads)  # on a busy machine two spinning threads cost more than they give
    p = archive.manifest["pooling"]["p"]
    cases = [(name, kind, copy, f) for name, image in images.items() for kind, copy, f in copies(image, rng, args.crops)]
    print(f"{len(images)} open images indexed; {len(cases)} copies "
          f"({', '.join(sorted({k for _, k, _, _ in cases}))}); seed {args.seed}; torch threads {args.threads}; "
          f"load average {os.getloadavg()[0]:.2f}")
    tally, seconds = Tally(), {"old": 0.0, "new": 0.0}
    for layer in LAYERS:
        print(f"explaining every copy on {layer} ...")
        node = archive._layer(layer)["node"]
        originals = archive.embedder.maps_at([archive.query_image(i) for i in ids.values()], (node,))[node]
        originals = dict(zip(ids, originals))
        mean = None
        for name, kind, copy, f in cases:
            t = time.perf_counter()
            new = archive.explain(copy, ids[name], layer=layer)
            seconds["new"] += time.perf_counter() - t
            if mean is None:  # the archive's mean descriptor, as the explanation used it
                mean, _ = archive._explain_baseline.descriptor(layer, archive.manifest["generation"], archive.store(layer))
            t = time.perf_counter()
            fq, fd = archive.embedder.maps_at([copy], (node,))[node][0], originals[name]
            old = old_pairs(fq, fd, p)
            raw = split(fq, fd, p)
            seconds["old"] += time.perf_counter() - t
            grid = tuple(new["pair_layer"]["grid"])
            for method, pairs, g in (("old", old, old[0]["grid"] if old else (8, 8)), ("new", new["pairs"], grid)):
                tally.add((layer, method, "right", kind), right(pairs, f, g))
                tally.add((layer, method, "right16", kind), right(pairs, f, g, 1 / 16))
                tally.add((layer, method, "corner"), [on_ring(pr, g) for pr in pairs[:3]])
            forms = {"old": raw, "new": {"query_map": new["query_map"], "match_map": new["match_map"]},
                     "channel": split(fq, fd, p, mean, form="channel")}
            for form, out in forms.items():
                for side in ("query_map", "match_map"):
                    share, area = ring_share(out[side])
                    tally.add((layer, form, "ring"), share)
                    tally.add((layer, form, "ring_area"), area)
                if kind == "crop":
                    share, area = inside_share(out["match_map"], f)
                    tally.add((layer, form, "inside"), share)
                    tally.add((layer, form, "inside_area"), area)
            tally.add((layer, "new", "transform_mirrored_right"),
                      [new["pair_layer"]["mirrored"] == (kind == "mirror")])
    report(tally, cases, seconds)
    exemplar_report(archive, images, ids)
    print(f"\nwhole run {time.time() - started:.0f} s; load average at end {os.getloadavg()[0]:.2f}")


def report(tally: Tally, cases, seconds) -> None:
    kinds = sorted({k for _, k, _, _ in cases}, key=["mirror", "crop", "half", "rotate"].index)
    print("\nTop-3 region pairs right (within one cell of the pairs' own grid; all kinds also at 1/16 of the image)")
    print("| layer | explanation | pair grid | " + " | ".join(kinds) + " | all | all, 1/16 tolerance | top-3 pairs with both "
          "regions on the frame's ring |")
    print("|---|---|---|" + "---|" * (len(kinds) + 3))
    for layer in LAYERS:
        for method, grid in (("old", "8 x 8 (score layer, summed)"), ("new", "32 x 32 (texture, stride 8)")):
            per = [tally.mean((layer, method, "right", k)) for k in kinds]
            every = np.mean(sum((tally.values[(layer, method, "right", k)] for k in kinds), []))
            every16 = np.mean(sum((tally.values[(layer, method, "right16", k)] for k in kinds), []))
            print(f"| {layer} | {method} | {grid} | " + " | ".join(f"{v:.2f}" for v in per)
                  + f" | **{every:.2f}** | {every16:.2f} | {tally.mean((layer, method, 'corner')):.2f} |")
    print("\nHeat-map mass on the outer ring of cells (both images of every pair) and, for crops, the original's mass "
          "inside the region the crop shows")
    print("| layer | split | ring mass | ring area | ring mass - area | crop: mass inside | inside area |")
    print("|---|---|---|---|---|---|---|")
    names = {"old": "raw cosine (old, mode=cosine)", "channel": "centred, channel-wise", "new": "centred, even (new)"}
    for layer in LAYERS:
        for form in ("old", "channel", "new"):
            ring, area = tally.mean((layer, form, "ring")), tally.mean((layer, form, "ring_area"))
            print(f"| {layer} | {names[form]} | {ring:.3f} | {area:.3f} | {ring - area:+.3f} | "
                  f"{tally.mean((layer, form, 'inside')):.3f} | {tally.mean((layer, form, 'inside_area')):.3f} |")
    print(f"\nmirror found by the vote exactly for the mirrored copies: "
          f"{tally.mean(('parts', 'new', 'transform_mirrored_right')):.2f} of copies")
    n = len(cases) * len(LAYERS)
    print(f"time per explanation: new {seconds['new'] / n:.2f} s (Archive.explain: decoding the original, three images "
          f"through the network, the split, the pairs); old pairs and split {seconds['old'] / n:.2f} s (the copy through "
          "the network; the original's maps computed once)")


def exemplar_report(archive, images, ids) -> None:
    """Where each channel's strongest archive position lies: on the frame's outer ring or inside."""
    print("\nChannel exemplars: share of channels whose strongest archive position is on the outer ring")
    print("| layer | whole map (old rule) | interior (new rule, what is stored) | ring area |")
    print("|---|---|---|---|")
    for layer in LAYERS:
        node = archive._layer(layer)["node"]
        maps = archive.embedder.maps_at([archive.query_image(i) for i in ids.values()], (node,))[node]
        n, c, h, w = maps.shape
        flat = maps.transpose(1, 0, 2, 3).reshape(c, -1)
        best = flat.argmax(axis=1) % (h * w)
        r, col = np.divmod(best, w)
        old = np.mean((r == 0) | (col == 0) | (r == h - 1) | (col == w - 1))
        stored = archive.exemplars(layer)
        cells = np.array([stored.top(k)[0]["cell"] for k in range(c) if stored.top(k)])
        new = np.mean((cells[:, 0] == 0) | (cells[:, 1] == 0) | (cells[:, 0] == h - 1) | (cells[:, 1] == w - 1))
        print(f"| {layer} | {old:.2f} | {new:.2f} | {1 - (h - 2) * (w - 2) / (h * w):.2f} |")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--crops", type=int, default=2, help="crops per image")
    parser.add_argument("--threads", type=int, default=1, help="torch threads")
    sys.stdout.reconfigure(line_buffering=True)
    run(parser.parse_args())


if __name__ == "__main__":
    main()
