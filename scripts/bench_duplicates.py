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
import sys
import tempfile
from itertools import combinations
from pathlib import Path

import numpy as np
from PIL import Image

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from index.duplicates import colour as dup_colour  # noqa: E402
from index.duplicates import groups as dup  # noqa: E402
from index.api import Archive  # noqa: E402
import dup_settings  # noqa: E402
from dup_set import HARD_FAMILIES, N_DISTRACTORS, STANDARD_FAMILIES, TRANSFORMS, build_large, build_set  # noqa: E402

SEED = 20260211
PHASH_THRESHOLDS = (6, 10)  # Hamming distance out of 64 bits; "common practice" values for pHash duplicates


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


# --- the run ----------------------------------------------------------------------------------------------
def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--workdir", type=Path, help="Keep the set and the archive here (reused when present).")
    ap.add_argument("--distractors", type=int, default=N_DISTRACTORS)
    ap.add_argument("--seed", type=int, default=SEED)
    ap.add_argument("--layer", default=dup.DEFAULT_LAYER)
    ap.add_argument("--threshold", type=float, help="Default: the calibrated threshold of the layer.")
    ap.add_argument("--raw", action="store_true", help="Threshold raw cosine similarity instead of the normalised score.")
    ap.add_argument("--large", type=int, default=0, metavar="N",
                    help="Also run every setting with N extra generated distractors (a second archive).")
    ap.add_argument("--sweep", action="store_true", help="Also print the calibration sweep (layers x thresholds).")
    ap.add_argument("--no-colour-check", dest="colour", action="store_false",
                    help="Leave out the colour check of near pairs (index/duplicates/colour.py), for comparison.")
    ap.add_argument("--no-loose-band", dest="loose", action="store_false",
                    help="Leave out the joins through the loose band (the grouping rule's last step), for comparison.")
    args = ap.parse_args()
    if args.workdir:
        args.workdir.mkdir(parents=True, exist_ok=True)
        run(args, args.workdir)
    else:
        with tempfile.TemporaryDirectory(prefix="kinscope-bench-") as tmp:
            run(args, Path(tmp))


class Indexed:
    """An indexed archive with its labels: ids, catalog rows, descriptors per layer and pHash bits, by position."""

    def __init__(self, archive: Archive, labels: list[dict], bits_cache: Path):
        rows = {r["id"]: r for r in archive.catalog.db.query(
            f"select {', '.join(dup.ROW_COLUMNS)} from images where status = 'ok'")}
        by_path = {r["path"]: i for i, r in rows.items()}
        self.labels = [l for l in labels if l["path"] in by_path]
        self.ids = np.array([by_path[l["path"]] for l in self.labels], np.int64)
        self.rows = rows
        self.vectors = {}
        for layer in archive.layer_names:
            ids, v = dup.all_vectors(archive.store(layer))
            pos = {int(i): n for n, i in enumerate(ids)}
            self.vectors[layer] = v[[pos[int(i)] for i in self.ids]]
        paths = [l["path"] for l in self.labels]
        if bits_cache.exists() and np.load(bits_cache).shape[0] == len(paths):
            self.bits = np.load(bits_cache)
        else:
            self.bits = phash_bits(paths)
            np.save(bits_cache, self.bits)
        self.source = {int(i): l["source"] for i, l in zip(self.ids, self.labels)}

    def ours(self, sel: np.ndarray, layer: str, threshold: float, normalised: bool, floor,
             colour: bool = True, loose: bool = True) -> list[set[int]]:
        """Our groups on the positions `sel`, as sets of positions (exact groups joined to near ones)."""
        ids = self.ids[sel]
        doc = dup.find(ids, self.vectors[layer][sel], [self.rows[int(i)] for i in ids], threshold=threshold,
                       normalised=normalised, min_cosine=floor, layer=layer, colour_check=colour, loose_band=loose)
        pos = dict(zip(ids.tolist(), sel.tolist()))
        return [{pos[i] for i in c} for c in clusters_from_doc(doc)]

    def phash(self, sel: np.ndarray, max_distance: int) -> list[set[int]]:
        return [set(sel[m].tolist()) for m in dup_settings.phash_groups(self.bits[sel], max_distance, dup.star_groups)]


def index_set(db: Path, roots: list[Path]) -> Archive:
    archive = Archive.open(db, create=True)
    report = archive.add(roots, progress=sys.stderr.isatty())
    print(f"archive {db.name}: indexed {report['embedded']} new, {report['unchanged']} unchanged")
    return archive


def run(args, work: Path) -> None:
    labels = build_set(work / "set", args.distractors, args.seed)
    archive = index_set(work / "db", [work / "set"])
    print(f"set: {sum(l['family'] is None and l['source'] is not None for l in labels)} originals, "
          f"{sum(l['family'] is not None for l in labels)} copies, {sum(l['source'] is None for l in labels)} distractors")
    ix = Indexed(archive, labels, work / "phash.npy")
    threshold = args.threshold if args.threshold is not None else dup.DEFAULT_THRESHOLDS[args.layer]
    normalised = not args.raw
    floor = dup.MIN_COSINE.get(args.layer) if normalised else None
    print(f"ours: layer {args.layer}, {'normalised score' if normalised else 'cosine'} >= {threshold}"
          + (f" and cosine >= {floor}" if floor is not None else "") + "; "
          f"pHash: imagehash.phash (64 bits), Hamming <= {' and <= '.join(map(str, PHASH_THRESHOLDS))}; "
          "pairwise precision / recall / F1 of the groups")
    print("colour check of near pairs: " + ("on (index/duplicates/colour.py)" if args.colour else "off")
          + "; loose band: " + (f"on ({dup.LOOSE_FACTORS}, {dup.LOOSE_LINKS} members)" if args.loose else "off"))
    ours = lambda sel: ix.ours(sel, args.layer, threshold, normalised, floor, args.colour, args.loose)  # noqa: E731
    family_table(ix, ours)
    one_archive_row(archive, ix, args.layer, threshold, normalised, args.colour, args.loose)
    settings = {"families": (ix, family_subsets(ix.labels)), **{f"{c}v": (ix, [dup_settings.versions(ix.labels, c)])
                                                                for c in dup_settings.VERSION_COUNTS}}
    settings_table(f"many versions in one run (with the {args.distractors} distractors)", ix, ours,
                   {name: sels for name, (_, sels) in settings.items() if name != "families"})
    if args.large:
        extra = [str(Path(p).resolve()) for p in build_large(work / "extra", args.large, args.seed)]  # as catalogued
        big = index_set(work / "db-large", [work / "set", work / "extra"])
        big_labels = labels + [{"path": p, "source": None, "family": None, "variant": None} for p in extra]
        bx = Indexed(big, big_labels, work / f"phash-large-{args.large}.npy")
        extra_pos = np.arange(len(ix.labels), len(bx.labels))
        grown = {name: [np.concatenate([sel, extra_pos]) for sel in sels] for name, (_, sels) in settings.items()}
        settings_table(f"large: every setting with {len(extra_pos)} extra generated distractors (dup_distractors.py)",
                       bx, lambda sel: bx.ours(sel, args.layer, threshold, normalised, floor, args.colour,
                                                    args.loose), grown)
        settings.update({f"{name}+large": (bx, sels) for name, sels in grown.items()})
        big.close()
    if args.sweep:
        runs = {}
        checks = {id(x): dup_colour.PairCheck([l["path"] for l in x.labels]) if args.colour else None
                  for x, _ in settings.values()}
        for layer, low in (("objects", 0.15), ("parts", 0.04)):
            runs[layer] = {name: [(sel, x.labels, dup.near_edges(
                x.vectors[layer][sel], (dup.loose_threshold(low, layer) if args.loose else None) or low,
                min_cosine=dup.MIN_COSINE[layer],
                pair_check=None if checks[id(x)] is None else
                (lambda i, j, sel=sel, c=checks[id(x)]: c(sel[i], sel[j])))[:3])
                for sel in sels] for name, (x, sels) in settings.items()}
        sweep(runs, {"objects": np.round(np.arange(0.15, 0.301, 0.01), 3),
                     "parts": np.round(np.arange(0.04, 0.0801, 0.005), 3)}, args.loose)
    archive.close()


def family_subsets(labels: list[dict]) -> list[np.ndarray]:
    """One position array per standard family: the originals, that family's copies, the distractors."""
    return [np.array([n for n, l in enumerate(labels) if l["family"] in (None, family)]) for family in STANDARD_FAMILIES]


def family_table(ix: Indexed, ours) -> None:
    head = f"{'family':<16} {'pairs':>5} | {'ours P':>6} {'R':>5} {'F1':>5}"
    for t in PHASH_THRESHOLDS:
        head += f" | {'pH<=' + str(t) + ' P':>8} {'R':>5} {'F1':>5}"
    print(head)
    print("-" * len(head))
    totals = {key: {"standard": np.zeros(3, int), "all": np.zeros(3, int)} for key in ("ours", *PHASH_THRESHOLDS)}
    for family in TRANSFORMS:
        sel = np.array([n for n, l in enumerate(ix.labels) if l["family"] in (None, family)])
        members = ix.ids[sel].tolist()
        as_ids = lambda groups: [set(ix.ids[list(g)].tolist()) for g in groups]  # noqa: E731
        counts = {"ours": pair_counts(as_ids(ours(sel)), ix.source, members)}
        for t in PHASH_THRESHOLDS:
            counts[t] = pair_counts(as_ids(ix.phash(sel, t)), ix.source, members)
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


def one_archive_row(archive: Archive, ix: Indexed, layer: str, threshold: float, normalised: bool,
                    colour: bool = True, loose: bool = True) -> None:
    """The shipped path end to end: every copy of every family in one archive, through Archive.duplicates."""
    doc = archive.duplicates(layer=layer, threshold=threshold, normalised=normalised, colour_check=colour,
                             loose_band=loose)
    members = ix.ids.tolist()
    c = pair_counts(clusters_from_doc(doc), ix.source, members)
    p, r, f = prf(*c)
    line = f"{'one archive':<16} {c[0] + c[2]:>5} | {p:>6.3f} {r:>5.3f} {f:>5.3f}"
    everything = np.arange(len(ix.labels))
    for t in PHASH_THRESHOLDS:
        groups = [set(ix.ids[list(g)].tolist()) for g in ix.phash(everything, t)]
        pp, rr, ff = prf(*pair_counts(groups, ix.source, members))
        line += f" | {pp:>8.3f} {rr:>5.3f} {ff:>5.3f}"
    print(line)
    print(f"standard = every family except {', '.join(HARD_FAMILIES)} (declared before measuring); "
          "'one archive' = all copies together through Archive.duplicates, pairs between copies included")


def settings_table(title: str, ix: Indexed, ours, settings: dict) -> None:
    """P = precision over every predicted pair; R std = recall over standard pairs; R all = over all pairs."""
    print(f"\n{title}")
    head = f"{'setting':<16} {'items':>6} {'pairs':>6} | {'ours P':>6} {'R std':>6} {'R all':>6}"
    for t in PHASH_THRESHOLDS:
        head += f" | {'pH<=' + str(t) + ' P':>8} {'R std':>6} {'R all':>6}"
    print(head)
    print("-" * len(head))
    for name, sels in settings.items():
        total = {key: np.zeros(6, int) for key in ("ours", *PHASH_THRESHOLDS)}
        for sel in sels:
            total["ours"] += dup_settings.counts(ours(sel), ix.labels, sel)
            for t in PHASH_THRESHOLDS:
                total[t] += dup_settings.counts(ix.phash(sel, t), ix.labels, sel)
        label = name.replace("v", " versions") if name[0].isdigit() else "families (pool)"
        line = f"{label:<16} {max(len(s) for s in sels):>6} {int(total['ours'][5]):>6} |"
        for key, c in total.items():
            p, rs, ra = dup_settings.ratios(c)
            line += f" {p:>{6 if key == 'ours' else 8}.3f} {rs:>6.3f} {ra:>6.3f} |"
        print(line.rstrip(" |"))


def sweep(layer_runs: dict, thresholds: dict, loose: bool = True) -> None:
    """Precision / recall per layer, setting and threshold (for calibration). The screened background and the
    colour check do not depend on the threshold, so each setting's pairs are scored once at the lowest one and
    filtered."""
    print("\ncalibration sweep (normalised score, cosine floor " + str(dup.MIN_COSINE) + "): P = precision, "
          "R = recall over standard pairs; families = pooled one-family runs; Nv = N versions in one run")
    for layer, runs in layer_runs.items():
        names = list(runs)
        print(f"{'layer':<8} {'T':>5} | " + " | ".join(f"{n[:13]:>13}" for n in names))
        grid = thresholds[layer]
        for t in grid:
            cells = []
            for name in names:
                total = np.zeros(6, int)
                for sel, labels, (a, b, s) in runs[name]:
                    band = dup.loose_threshold(t, layer) if loose else None
                    keep = s >= (t if band is None else band)
                    groups = [set(sel[m].tolist()) for _, m in dup.near_groups(
                        len(sel), a[keep], b[keep], s[keep], threshold=t, loose=band, loose_links=dup.LOOSE_LINKS)]
                    total += dup_settings.counts(groups, labels, sel)
                p, r, _ = dup_settings.ratios(total)
                cells.append(f"{p:>6.3f} {r:>6.3f}")
            print(f"{layer:<8} {t:>5.3f} | " + " | ".join(cells))


if __name__ == "__main__":
    main()
