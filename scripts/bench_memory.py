"""Peak memory of `kinscope index` against the size of the archive it adds to.

    .venv/bin/python scripts/bench_memory.py [--sizes 0,100000,300000,1000000] [--layers all] [--new 200]
                                             [--grow-sizes 100000,1000000]

For each size N, a fresh database is made that already holds N images: N empty files on disk (so the
scan walks and compares them, as a nightly re-run over a large archive does), their catalog rows,
and N synthetic descriptors per layer (tests.synthetic.Descriptors, at each layer's size) in the
vector stores, built as kinscope builds them (flat while small, IVF above, with the codes the policy
gives). Then `kinscope index` runs in a fresh process on the archive root with `--new` small JPEGs
added, and its peak resident memory (the indexer's lifetime peak, ru_maxrss) and that of its decode
workers are printed beside N, with the stores' file sizes. The growth per image is the slope between sizes.

Then, for each of --grow-sizes, a first run's store side: a fresh process creates an archive, loads
the indexer's ONNX model as a first run does (exported in a child process) and runs it once, then
grows the four layers' stores to that many synthetic descriptors through the indexer's own code
(every flat -> IVF and IVF -> more-lists rebuild on the way, checkpoints every 8192 images), and
prints its peak resident memory beside its memory with the model loaded: the difference is what the
stores and their rebuilds add. Decoding and the catalog are left out (see the rows above for them).

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

import faiss
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
    """Catalog rows and vector stores for these files, as if they had been indexed.

    Each layer's index is built in this process as the indexer would hold it at this size (flat while
    small, IVF with lists_for(N) lists above), written as one FAISS file, then laid out as the
    indexer's segments by the same conversion that upgrades an archive from before segments."""
    from index.api import Archive
    from index.db.manifest import layer_entry
    from index.vectors import kinds as vi
    from index.vectors.kinds import FLAT, IVF, IndexPolicy
    from tests.synthetic import Descriptors

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
    kinds = {}
    for k, layer in enumerate(archive.layer_names):
        dim = layer_entry(archive.manifest, layer)["dim"]
        x = np.zeros((len(ids), dim), np.float32)
        for start in range(0, len(ids), 100_000):  # chunks of clustered descriptors, each its own clusters
            part = slice(start, start + 100_000)
            x[part] = Descriptors(dim, seed=1000 * k + start // 100_000).database(len(ids[part]))
        kind = vi.wanted_kind(FLAT, len(ids), dim, 0, policy) or FLAT
        if kind == IVF:
            nlist = vi.lists_for(len(ids), policy)
            index = vi.new_ivf(dim, nlist, policy)
            rng = np.random.default_rng(k)
            index.train(x[np.sort(rng.choice(len(ids), min(len(ids), nlist * policy.train_per_list), replace=False))])
            faiss.extract_index_ivf(index).nprobe = max(1, nlist // 10)
            faiss.extract_index_ivf(index).set_direct_map_type(faiss.DirectMap.Hashtable)
        else:
            index = vi.flat(dim)
        for start in range(0, len(ids), 100_000):
            index.add_with_ids(x[start:start + 100_000], ids[start:start + 100_000])
        del x
        faiss.write_index(index, str(db / layer_entry(archive.manifest, layer)["file"]))
        kinds[layer] = vi.type_name(vi.index_info(index))
        del index
        archive.indexer.writer(layer)  # laid out as segments (codec + segment files)
    archive.indexer.save_stores()
    archive.close()
    return kinds


def grow(work: Path, n: int, layers: list[str] | None, batch: int = 512, checkpoint: int = 8_192) -> dict:
    """A first run's store side: the stores of an empty archive grown to n synthetic descriptors per
    layer through the indexer's own code (LayerStore.add, every rebuild on the way, a checkpoint every
    `checkpoint` images), in this process (no model loaded); its peak resident memory."""
    from PIL import Image

    from index.api import Archive
    from index.db.manifest import layer_entry
    from index.ingest.pipeline import peak_rss_self
    from tests.synthetic import Descriptors

    archive = Archive.open(work / "db", create=True, **({"layers": layers} if layers else {}))
    dims = {layer: layer_entry(archive.manifest, layer)["dim"] for layer in archive.layer_names}
    # What the indexer holds besides its stores: the ONNX model (exported in a child process, as a
    # first run does), run once on a batch of 8 so that its working memory is in the figure too.
    embedder = archive.indexer.embedder_for_run("onnx", n)
    side = archive.manifest["backbone"]["input_size"]
    embedder.embed_images([Image.new("RGB", (side, side), (k * 30, 90, 160)) for k in range(8)])
    start_rss = peak_rss_self()
    t = time.perf_counter()
    slowest = 0.0
    step = 2_000  # descriptors generated at a time (each block its own clusters), about 18 MB for four layers
    for start in range(0, n, step):
        count = min(step, n - start)
        chunk = {layer: Descriptors(dim, seed=k * 10**6 + start // step).database(count)
                 for k, (layer, dim) in enumerate(dims.items())}
        for off in range(0, count, batch):
            ids = np.arange(start + off + 1, start + min(count, off + batch) + 1, dtype=np.int64)
            t_add = time.perf_counter()
            for layer in archive.layer_names:
                archive.indexer.writer(layer).add(ids, chunk[layer][off:off + len(ids)])
            slowest = max(slowest, time.perf_counter() - t_add)
            if (start + off + len(ids)) % checkpoint < batch:
                archive.indexer.save_stores()
        del chunk
    archive.indexer.save_stores()
    info = {layer: archive.indexer.writer(layer).index_info() for layer in archive.layer_names}
    return {"n": n, "seconds": time.perf_counter() - t, "peak_rss": peak_rss_self(), "start_rss": start_rss,
            "torch": "torch" in sys.modules,
            "slowest_batch": slowest, "indexes": info,
            "disk": sum(f.stat().st_size for f in (work / "db" / "stores").rglob("*") if f.is_file())}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", default="0,100000,300000,1000000", help="archive sizes, comma-separated")
    ap.add_argument("--layers", default=None, help="layers (comma-separated; default: kinscope's default, all four)")
    ap.add_argument("--new", type=int, default=200, help="new JPEGs (640 x 480) indexed into each archive")
    ap.add_argument("--work", default=os.path.join(tempfile.gettempdir(), "kinscope-bench-memory"))
    ap.add_argument("--grow-sizes", default="100000,1000000",
                    help="first-run store growth: sizes to grow empty stores to (comma-separated; empty: skip)")
    ap.add_argument("--grow-one", type=int, help=argparse.SUPPRESS)  # the child process of a growth run
    args = ap.parse_args()
    layers = args.layers.split(",") if args.layers else None
    if args.grow_one is not None:
        print(json.dumps(grow(Path(args.work), args.grow_one, layers)))
        return
    sizes = [int(s) for s in args.sizes.split(",") if s]

    from bench_index import load, machine, make_set
    from index.vectors import kinds as vi

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
        store_bytes = sum(f.stat().st_size for f in (work / "db" / "stores").rglob("*") if f.is_file())
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
    grown = []
    for n in [int(s) for s in args.grow_sizes.split(",") if s]:
        shutil.rmtree(work, ignore_errors=True)
        work.mkdir(parents=True)
        cmd = [sys.executable, __file__, "--grow-one", str(n), "--work", str(work)] + (["--layers", args.layers] if args.layers else [])
        out = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT)
        if out.returncode != 0:
            sys.exit(f"growing stores to {n} failed:\n{out.stderr}")
        g = json.loads(out.stdout.strip().splitlines()[-1])
        grown.append(g)
        print(f"grown to {n:,}: {g['seconds']:.0f} s, peak {g['peak_rss'] / 2**20:.0f} MB (model loaded "
              f"{g['start_rss'] / 2**20:.0f} MB, torch imported: {g['torch']}), slowest batch {g['slowest_batch']:.1f} s, stores "
              f"{g['disk'] / 2**20:.0f} MB on disk; " + "; ".join(
                  f"{k} {vi.type_name(v)} nlist {v.get('nlist', '-')} recall@10 {v.get('recall_at_10', '-')}"
                  for k, v in g["indexes"].items()), flush=True)
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
    if grown:
        print("\n| first run: stores grown to | seconds | peak RSS | with the model loaded | added by the stores | "
              "slowest batch (a rebuild) | stores on disk |")
        print("|---|---|---|---|---|---|---|")
        for g in grown:
            print(f"| {g['n']:,} | {g['seconds']:.0f} | {g['peak_rss'] / 2**20:,.0f} MB | {g['start_rss'] / 2**20:,.0f} MB | "
                  f"{(g['peak_rss'] - g['start_rss']) / 2**20:,.0f} MB | {g['slowest_batch']:.1f} s | "
                  f"{g['disk'] / 2**20:,.0f} MB |")


if __name__ == "__main__":
    main()
