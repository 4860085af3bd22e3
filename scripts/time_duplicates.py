#!/usr/bin/env python3
"""Time the duplicate job on a synthetic archive of many items (default 100 000), after indexing.

No images are embedded: the script writes catalog rows and synthetic `objects` descriptors straight
into a fresh archive, with planted near copies, then times `Archive.duplicates()` end to end (reading
the vectors and rows, the FAISS neighbour search, the background, the grouping, the document) and
prints how many planted pairs were grouped, with the grouping's loose band on and off (alternately, twice each).
A quick reading, not a test:

    .venv/bin/python scripts/time_duplicates.py [-n 100000] [--keep DIR]

With --db DIR it times an existing (real) archive instead, with the colour check of near pairs off and on,
alternately (twice each), and prints how many files the check read and how many pairs it refused.
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from index.api import Archive  # noqa: E402
from index.model.pooling import l2_normalize  # noqa: E402

LAYER = "objects"
DIM = 1280


def synthetic(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Non-negative, correlated descriptors (a low-rank model through a ReLU, like post-activation GeM),
    with about 10% of them near copies of another item. Returns vectors and the source of each row."""
    rng = np.random.default_rng(seed)
    n_copies = n // 10
    n_base = n - n_copies
    basis = rng.normal(size=(64, DIM)).astype(np.float32) / 8
    mean = np.abs(rng.normal(size=DIM)).astype(np.float32) * 0.3
    base = np.empty((n_base, DIM), np.float32)
    for start in range(0, n_base, 10_000):
        z = rng.normal(size=(min(10_000, n_base - start), 64)).astype(np.float32)
        base[start:start + len(z)] = l2_normalize(np.maximum(z @ basis + mean + 0.05 * rng.normal(size=(len(z), DIM)), 0))
    sources = rng.integers(0, n_base, n_copies)
    noise = rng.uniform(0.2, 0.5, (n_copies, 1)).astype(np.float32)
    copies = l2_normalize(np.maximum(base[sources] + noise * rng.normal(size=(n_copies, DIM)).astype(np.float32)
                                     / np.sqrt(DIM), 0))
    return np.vstack([base, copies]), np.concatenate([np.arange(n_base), sources])


def build(db: Path, n: int) -> np.ndarray:
    archive = Archive.open(db, create=True, layers=[LAYER])
    vectors, source = synthetic(n)
    ids = np.arange(1, n + 1, dtype=np.int64)
    rng = np.random.default_rng(1)
    rows = ({"id": int(i), "path": f"/synthetic/folder-{i % 500:03d}/item-{i:06d}.jpg", "folder": f"/synthetic/folder-{i % 500:03d}",
             "name": f"item-{i:06d}.jpg", "size": int(rng.integers(50_000, 5_000_000)), "mtime": 1.7e9 + float(i),
             "sha256": f"{i:064x}", "status": "ok", "width": 1024, "height": 768} for i in ids)
    archive.catalog.db["images"].insert_all(rows, batch_size=5000)
    archive.indexer.writer(LAYER).add(ids, vectors)
    archive.indexer.save_stores()
    archive.close()
    return source


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("-n", type=int, default=100_000)
    ap.add_argument("--keep", type=Path, help="Build the archive here instead of a temporary folder.")
    ap.add_argument("--db", type=Path, help="Time this indexed archive with the colour check off and on instead.")
    args = ap.parse_args()
    if args.db:
        return colour_check_cost(args.db)
    with tempfile.TemporaryDirectory(prefix="kinscope-time-") as tmp:
        db = args.keep or Path(tmp) / "db"
        t0 = time.perf_counter()
        source = build(db, args.n)
        print(f"built a synthetic archive of {args.n} items in {time.perf_counter() - t0:.1f} s "
              f"({os.cpu_count()} cores)")
        archive = Archive.open(db)
        planted = len(source) - len(np.unique(source))
        for loose in (True, False, True, False):  # the loose band on and off, alternately, twice each
            t0 = time.perf_counter()
            doc = archive.duplicates(layer=LAYER, progress=sys.stderr.isatty(), loose_band=loose)
            elapsed = time.perf_counter() - t0
            grouped_with_source = 0
            for g in doc["groups"]:
                members = [m["id"] - 1 for m in g["members"]]
                grouped_with_source += sum(1 for m in members if m >= len(source) - planted and source[m] in members)
            print(f"Archive.duplicates (loose band {'on ' if loose else 'off'}): {elapsed:.1f} s for "
                  f"{doc['counts']['images']} items; {doc['counts']['near']} near groups; "
                  f"{grouped_with_source}/{planted} planted copies grouped with their source", flush=True)
        archive.close()


def colour_check_cost(db: Path) -> None:
    """Archive.duplicates on a real archive, colour check off / on / off / on, with the check's counts."""
    archive = Archive.open(db)
    print(f"{db}: {os.cpu_count()} cores")
    for colour in (False, True, False, True):
        t0 = time.perf_counter()
        doc = archive.duplicates(progress=sys.stderr.isatty(), colour_check=colour)
        c = doc["counts"]
        print(f"colour check {'on ' if colour else 'off'}: {time.perf_counter() - t0:6.2f} s for {c['images']} items; "
              f"{c['near']} near groups; files read {c['colour_read']}, pairs refused {c['colour_vetoed']}")
    archive.close()


if __name__ == "__main__":
    main()
