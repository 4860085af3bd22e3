"""Search on synthetic descriptors: latency on one core, recall@10 against exact search, build time, memory.

    .venv/bin/python scripts/bench_search.py [--sizes 100000 1000000] [--dim 672] [--queries 1000]

The descriptors come from tests.synthetic.Descriptors (clusters, power-law spectrum, calibrated on the
demo archive's `parts` descriptors), at the default search layer's size (672). Queries are new points
from the same clusters, not stored vectors. For each size and each index type kinscope offers (flat;
IVF grown as the indexer grows it (index.vectors.writer: flat first, IVF past the flat limit, retrained
after each doubling and with twice the lists after each fourfold growth, nprobe calibrated at each rebuild
on 500 stored vectors as queries for recall@10 of 0.95 + 0.01 margin), shown with half and twice that
nprobe: with the default 16-bit float codes, with the 8-bit codes option (`codes="sq8"`), and behind PCA
to 256 dimensions), and IVF-PQ fast-scan with an exact re-rank, which is not offered (see the recall):

- recall@10: share of the exact 10 nearest (FAISS IndexFlatIP, all cores) found in the first 10; at the
  calibrated nprobe also apart for queries near clusters added after the store's last rebuild (the
  vectors arrive cluster by cluster, so these lists were trained without them) and near earlier ones;
- latency: per query, one query at a time, FAISS on one thread: median and 95th percentile;
- build: seconds to grow the store to its size, every rebuild on the way included (all cores);
- memory: the store's files (codec and segments) in bytes per vector, and the growth of resident memory
  when a reader loads them into one index.

Nothing is asserted; times depend on the machine and on what else runs (the load average is printed).
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import faiss
import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from index.vectors.writer import LayerStore  # noqa: E402
from index.vectors.segments import assemble, referenced  # noqa: E402
from index.vectors.reader import VectorStore  # noqa: E402
from tests.synthetic import Descriptors  # noqa: E402
from index.vectors.kinds import IndexPolicy  # noqa: E402
from index.vectors import kinds as vi  # noqa: E402


def rss() -> int:
    for line in open("/proc/self/status"):
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    return 0


def recall(found: np.ndarray, truth: np.ndarray) -> float:
    return float(np.mean([len(set(f[:10]) & set(t[:10])) / 10 for f, t in zip(found, truth)]))


def latency(search, queries: np.ndarray) -> tuple[float, float, np.ndarray]:
    """Median and p95 milliseconds per query on one FAISS thread, and the ids found."""
    faiss.omp_set_num_threads(1)
    times, found = [], []
    for q in queries:
        t = time.perf_counter()
        ids = search(q[None])
        times.append(time.perf_counter() - t)
        found.append(ids)
    faiss.omp_set_num_threads(os.cpu_count() or 1)
    return float(np.median(times) * 1e3), float(np.percentile(times, 95) * 1e3), np.array(found)


def file_bytes(index: faiss.Index) -> int:
    with tempfile.NamedTemporaryFile() as fh:
        faiss.write_index(index, fh.name)
        return os.path.getsize(fh.name)


def grow(db: Path, vectors: np.ndarray, ids: np.ndarray, policy: IndexPolicy) -> tuple[float, dict, int]:
    """Fill a layer's store as the indexer does (index.vectors.writer: flat, then IVF-SQ8 retrained as it
    grows), 10 000 vectors at a time with a checkpoint every 50 000; seconds, final state, bytes on disk."""
    writer = LayerStore(db, "bench", vectors.shape[1], None, policy=policy)
    t = time.perf_counter()
    for k, start in enumerate(range(0, len(ids), 10_000)):
        writer.add(ids[start:start + 10_000], vectors[start:start + 10_000])
        if k % 5 == 4:
            writer.flush()
            writer.committed()
    state = writer.flush()
    writer.committed()
    seconds = time.perf_counter() - t
    disk = sum((db / f).stat().st_size for f in referenced(state))
    return seconds, state, disk


def query_clusters(gen: Descriptors, nq: int, n: int) -> np.ndarray:
    """The cluster each of gen.queries(nq, n) was drawn around (its first draw, repeated). Clusters arrive
    in order (Descriptors.database sorts them), so a cluster's number tells when its vectors were added."""
    return np.random.default_rng([gen.seed, 3]).integers(0, max(1, n // gen.cluster_size), nq)


def pq_rerank(vectors: np.ndarray, ids: np.ndarray, nlist: int, m: int, seed: int = 0):
    """IVF-PQ fast scan (4-bit codes) with an exact re-rank of 16 x k candidates (not offered)."""
    n, d = vectors.shape
    index = faiss.index_factory(d, f"IVF{nlist},PQ{m}x4fs", faiss.METRIC_INNER_PRODUCT)
    rng = np.random.default_rng(seed)
    index.train(vectors[rng.choice(n, min(n, 40 * nlist), replace=False)])
    index.add(vectors)
    return index


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[100_000, 1_000_000])
    ap.add_argument("--dim", type=int, default=672)
    ap.add_argument("--queries", type=int, default=1000)
    ap.add_argument("--flat-queries", type=int, default=200, help="queries timed for exact search")
    ap.add_argument("--pca-dim", type=int, default=256)
    ap.add_argument("--work", default=tempfile.gettempdir(), help="folder for the stores' files while they grow")
    args = ap.parse_args()
    faiss.omp_set_num_threads(os.cpu_count() or 1)
    print(f"load average at start: {' '.join(f'{v:.2f}' for v in os.getloadavg())}; FAISS {faiss.__version__}")
    table = []
    for n in args.sizes:
        gen = Descriptors(args.dim)
        t = time.perf_counter()
        vectors = gen.database(n)
        queries = gen.queries(args.queries, n)
        ids = np.arange(1, n + 1, dtype=np.int64)
        print(f"\n== {n:,} descriptors of dimension {args.dim} (generated in {time.perf_counter() - t:.0f} s)", flush=True)
        exact = faiss.IndexFlatIP(args.dim)
        exact.add(vectors)
        t = time.perf_counter()
        truth = ids[exact.search(queries, 10)[1]]
        print(f"exact neighbours of {args.queries} queries, all cores: {time.perf_counter() - t:.1f} s", flush=True)
        del exact

        before = rss()
        t = time.perf_counter()
        flat = VectorStore(args.dim)
        for start in range(0, n, 100_000):
            flat.add(ids[start:start + 100_000], vectors[start:start + 100_000])
        build, grown = time.perf_counter() - t, rss() - before
        med, p95, found = latency(lambda q: flat.search(q, 10)[1][0], queries[:args.flat_queries])
        row = ("flat (exact)", n, "-", recall(found, truth[:args.flat_queries]), med, p95, build,
               file_bytes(flat.index) / n, grown / n)
        table.append(row)
        print(f"{row[0]}: recall@10 {row[3]:.3f}, {med:.2f} ms median, {p95:.2f} ms p95, build {build:.1f} s", flush=True)

        variants = (("", IndexPolicy()), (" (option)", IndexPolicy(codes="sq8")),
                    (f"pca{args.pca_dim} + ", IndexPolicy(pca_dim=args.pca_dim)))
        for name, policy in variants:
            with tempfile.TemporaryDirectory(dir=args.work) as tmp:
                build, state, disk = grow(Path(tmp), vectors, ids, policy)
                before = rss()
                store = VectorStore(args.dim, assemble(Path(tmp), state), measured=state["measured"])
                grown = rss() - before
            info = store.index_info()
            label = (name + vi.type_name(info)) if name.startswith("pca") else vi.type_name(info) + name
            ivf = faiss.extract_index_ivf(store.index)
            print(f"{label}: nlist {info['nlist']}, nprobe {info['nprobe']} (calibrated when the store held "
                  f"{info['built_for']:,}: recall@10 {info['recall_at_10']:.3f} on {info['recall_queries']} stored "
                  f"vectors as queries), grown to {n:,} in {build:.1f} s; list sizes' imbalance factor "
                  f"{ivf.invlists.imbalance_factor():.2f}", flush=True)
            calibrated = info["nprobe"]
            for nprobe in sorted({calibrated // 2, calibrated, calibrated * 2} - {0}):
                ivf.nprobe = nprobe
                med, p95, found = latency(lambda q: store.search(q, 10)[1][0], queries)
                row = (label + (" (calibrated)" if nprobe == calibrated else ""), n, f"{info['nlist']}/{nprobe}",
                       recall(found, truth), med, p95, build, disk / n, grown / n)
                table.append(row)
                print(f"   nprobe {nprobe}: recall@10 {row[3]:.3f}, {med:.2f} ms median, {p95:.2f} ms p95", flush=True)
                late = query_clusters(gen, len(queries), n) >= info["built_for"] / n * (n // gen.cluster_size)
                if nprobe == calibrated and late.any():
                    print(f"   ... of which queries near clusters added after the last rebuild ({late.sum()}): "
                          f"{recall(found[late], truth[late]):.3f}; near earlier ones ({(~late).sum()}): "
                          f"{recall(found[~late], truth[~late]):.3f}", flush=True)
            del store

        nlist = vi.lists_for(n, IndexPolicy())
        m = args.dim // 4
        before = rss()
        t = time.perf_counter()
        pq = pq_rerank(vectors, ids, nlist, m)
        build, grown = time.perf_counter() - t, rss() - before
        for nprobe in (64, 256):
            pq.nprobe = nprobe

            def search(q, pq=pq):
                cand = pq.search(q, 160)[1][0]
                cand = cand[cand >= 0]
                return ids[cand[np.argsort(-(vectors[cand] @ q[0]))[:10]]]

            med, p95, found = latency(search, queries)
            row = (f"ivf-pq{m}x4fs + exact re-rank (not offered)", n, f"{nlist}/{nprobe}", recall(found, truth), med, p95,
                   build, file_bytes(pq) / n, grown / n)
            table.append(row)
            print(f"{row[0]} nprobe {nprobe}: recall@10 {row[3]:.3f}, {med:.2f} ms median (re-rank needs the float "
                  f"vectors too)", flush=True)
        del pq, flat, vectors

    print(f"\nload average at end: {' '.join(f'{v:.2f}' for v in os.getloadavg())}")
    print("\n| index | vectors | nlist/nprobe | recall@10 | median ms | p95 ms | build s | file bytes/vector | RSS growth bytes/vector |")
    print("|---|---|---|---|---|---|---|---|---|")
    for label, n, probe, r, med, p95, build, fb, grown in table:
        print(f"| {label} | {n:,} | {probe} | {r:.3f} | {med:.2f} | {p95:.2f} | {build:.1f} | {fb:.0f} | {grown:.0f} |")


if __name__ == "__main__":
    main()
