"""Peak memory of `kinscope index` against the size of the archive it adds to.

    .venv/bin/python scripts/bench_memory.py [--sizes 0,100000,300000,1000000] [--layers all] [--new 200]

For each size N, a fresh database is made that already holds N images: N empty files on disk (so the
scan walks and compares them, as a nightly re-run over a large archive does), their catalog rows,
and N synthetic descriptors per layer (index.synthetic.Descriptors, at each layer's size) in the
vector stores, built as kinscope builds them (flat while small, IVF-SQ8 above). Then `kinscope index`
runs in a fresh process on the archive root with `--new` small JPEGs added, and its peak resident
memory (the indexer's lifetime peak, ru_maxrss) and that of its decode workers are printed beside N,
with the stores' file sizes. The growth per image is the slope between sizes.

The JPEGs come from scripts/bench_index.py's generated small set when present, otherwise they are
made the same way (scikit-image / scikit-learn sample photographs). Nothing is asserted.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "scripts"))


def empty_files(folder: Path, n: int) -> list[tuple[str, int, float]]:
    """n empty .jpg files in sub-folders of 1000; (path, size, mtime) of each."""
    out = []
    for start in range(0, n, 1000):
        sub = folder / f"{start // 1000:05d}"
        sub.mkdir(parents=True, exist_ok=True)
        for i in range(start, min(n, start + 1000)):
            p = sub / f"{i:07d}.jpg"
            with open(p, "wb"):
                pass
            st = p.stat()
            out.append((str(p), st.st_size, st.st_mtime))
    return out


def prefill(db: Path, files: list[tuple[str, int, float]], layers: list[str] | None) -> dict:
    """Catalog rows and vector stores for these files, as if they had been indexed."""
    from index import vector_index as vi
    from index.api import Archive
    from index.store import VectorStore
    from index.synthetic import Descriptors
    from index.vector_index import IndexPolicy

    archive = Archive.open(db, create=True, **({"layers": layers} if layers else {}))
    run_id = archive.catalog.start_run(["prefill"])
    with archive.catalog.db.conn as conn:
        conn.executemany(
            "insert into images (path, folder, name, size, mtime, sha256, status, run_id, width, height, format, "
            "keywords) values (?, ?, ?, ?, ?, ?, 'ok', ?, 3000, 2000, 'JPEG', '[]')",
            [(p, os.path.dirname(p), os.path.basename(p), size, mtime, f"{i:064x}", run_id)
             for i, (p, size, mtime) in enumerate(files)])
    ids = np.array([r[0] for r in archive.catalog.db.execute("select id from images order by id").fetchall()],
                   np.int64)
    archive.catalog.finish_run(run_id, "done", {"new": len(files)})
    policy = IndexPolicy.from_dict(archive.manifest.get("vector_index"))
    for k, layer in enumerate(archive.layer_names):
        dim = archive._layer(layer)["dim"]
        index = vi.flat(dim)
        for start in range(0, len(ids), 100_000):  # chunks of clustered descriptors, each its own clusters
            part = ids[start:start + 100_000]
            index.add_with_ids(Descriptors(dim, seed=1000 * k + start // 100_000).database(len(part)), part)
        store = VectorStore(dim, index, policy=policy)
        if len(ids):
            store.maintain()  # flat while small, IVF-SQ8 above: what VectorStore.add would have built
        archive._stores[layer] = store
    archive._save_stores()
    info = {layer: archive.store(layer).describe()["type"] for layer in archive.layer_names}
    archive.close()
    return info


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", default="0,100000,300000,1000000", help="archive sizes, comma-separated")
    ap.add_argument("--layers", default=None, help="layers (comma-separated; default: kinscope's default, all four)")
    ap.add_argument("--new", type=int, default=200, help="new JPEGs (640 x 480) indexed into each archive")
    ap.add_argument("--work", default=os.path.join(tempfile.gettempdir(), "kinscope-bench-memory"))
    args = ap.parse_args()
    sizes = [int(s) for s in args.sizes.split(",")]
    layers = args.layers.split(",") if args.layers else None

    from bench_index import load, machine, make_set

    work = Path(args.work)
    print(f"machine: {machine()}")
    print(f"load average at start: {load()}")
    small = make_set(Path(tempfile.gettempdir()) / "kinscope-bench" / "small", max(args.new, 1000), (640, 480), 2)
    rows = []
    for n in sizes:
        shutil.rmtree(work, ignore_errors=True)
        archive_root = work / "archive"
        (archive_root / "new").mkdir(parents=True)
        for p in small[:args.new]:
            shutil.copy(p, archive_root / "new")
        t = time.perf_counter()
        files = empty_files(archive_root / "old", n)
        kinds = prefill(work / "db", files, layers)
        prep = time.perf_counter() - t
        store_bytes = sum(f.stat().st_size for f in (work / "db").glob("vectors-*.faiss"))
        cmd = [sys.executable, "-m", "index", "index", str(archive_root), "--db", str(work / "db"), "-q", "--json"]
        t = time.perf_counter()
        out = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT)
        wall = time.perf_counter() - t
        if out.returncode != 0:
            sys.exit(f"kinscope index failed at N = {n}:\n{out.stderr}")
        report = json.loads(out.stdout)
        rows.append((n, kinds, store_bytes, report, wall))
        print(f"N = {n:,}: prepared in {prep:.0f} s ({', '.join(f'{k} {v}' for k, v in kinds.items())}); "
              f"index run {wall:.1f} s, {report['embedded']} new embedded, unchanged {report.get('unchanged', '?')}; "
              f"peak {report['peak_rss'] / 2**20:.0f} MB + workers {report['peak_rss_workers'] / 2**20:.0f} MB; "
              f"stores {store_bytes / 2**20:.0f} MB on disk", flush=True)
    shutil.rmtree(work, ignore_errors=True)

    print(f"\nload average at end: {load()}")
    print("\n| images already indexed | index types | stores on disk | indexer peak RSS | decode workers' peak RSS "
          "| growth since the previous size, per image |")
    print("|---|---|---|---|---|---|")
    for k, (n, kinds, store_bytes, report, _) in enumerate(rows):
        growth = ""
        if k:
            prev_n, prev = rows[k - 1][0], rows[k - 1][3]
            growth = f"{(report['peak_rss'] - prev['peak_rss']) / (n - prev_n):,.0f} B"
        types = ", ".join(sorted(set(kinds.values())))
        print(f"| {n:,} | {types} | {store_bytes / 2**20:,.0f} MB | {report['peak_rss'] / 2**20:,.0f} MB | "
              f"{report['peak_rss_workers'] / 2**20:,.0f} MB | {growth} |")


if __name__ == "__main__":
    main()
