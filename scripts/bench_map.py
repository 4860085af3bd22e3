"""The collection map's layout: which method, and what it costs at 10 000 to 1 000 000 items.

    .venv/bin/python scripts/bench_map.py compare            # methods side by side (about 10 min)
    .venv/bin/python scripts/bench_map.py scale [--sizes 10000 100000 1000000] [--sample N] [--full-limit N]

`compare` lays out the same data with each candidate: PCA to 2-D (a linear baseline), t-SNE through
scikit-learn (Barnes-Hut), t-SNE through openTSNE (FFT gradients; what index/map/layout.py uses) and
UMAP through umap-learn (when importable; PYTHONPATH may point at a folder it was installed into), all
after PCA to 50 dimensions, on two data sets: scikit-learn's handwritten digits (load_digits, 1797
images of 8x8 pixels, the pixels as descriptors; an outside data set with 10 known classes) and 10 000
synthetic clustered descriptors (tests.synthetic, 672 dimensions like the `parts` layer).

`scale` runs kinscope's own path (index.map.layout.layout: t-SNE of at most --sample items, default
SAMPLE, the rest placed by their nearest sampled neighbours) on synthetic descriptors, and with
--full-limit also a t-SNE of every item for sizes above the sample up to that limit.

For each case: seconds, the resident memory the layout added (sampled every 20 ms, over what the data
already took), the share of each item's 10 nearest neighbours in descriptor space that are among its
10 nearest on the map (on 2000 random items past 10 000), the same for a random layout, and for the
digits the share of each item's 10 map neighbours of its own class. Each case runs in a child process.
Nothing is asserted; the load average is printed (the machine is shared).
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from index.map import layout as ml  # noqa: E402
from tests.synthetic import Descriptors  # noqa: E402


def rss() -> int:
    for line in open("/proc/self/status"):
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    return 0


class PeakMemory:
    """Highest resident memory while the block runs, sampled every 20 ms."""

    def __enter__(self):
        self.start = self.peak = rss()
        self.running = True
        self.thread = threading.Thread(target=self._watch, daemon=True)
        self.thread.start()
        return self

    def _watch(self):
        while self.running:
            self.peak = max(self.peak, rss())
            time.sleep(0.02)

    def __exit__(self, *exc):
        self.running = False
        self.thread.join()
        self.peak = max(self.peak, rss())

    @property
    def added(self) -> int:
        return self.peak - self.start


def data(name: str, n: int):
    """(vectors, labels or None)."""
    if name == "digits":
        from sklearn.datasets import load_digits

        d = load_digits()  # scikit-learn's copy of the UCI optical digits test set: 1797 images, 10 classes
        return d.data.astype(np.float32), d.target
    return Descriptors(672, seed=1).database(n), None


def method(name: str, x: np.ndarray, seed: int) -> np.ndarray:
    """One candidate's 2-D layout of all rows of x (PCA to 50 dimensions first, as t-SNE practice has it)."""
    reduced = ml.Projection.fit(x)(x) if x.shape[1] > ml.PCA_DIM else x
    if name == "pca2":
        return ml.Projection.fit(x, 2)(x)
    if name == "sklearn-tsne":
        from sklearn.manifold import TSNE

        return TSNE(2, perplexity=30, init="pca", random_state=seed, max_iter=750, n_jobs=os.cpu_count()).fit_transform(reduced)
    if name == "opentsne":
        return ml.tsne(reduced, seed)
    if name == "umap":
        import umap  # random_state makes umap-learn run on one thread: the price of a repeatable layout

        return umap.UMAP(n_neighbors=15, min_dist=0.1, random_state=seed).fit_transform(reduced)
    raise ValueError(name)


def shares(x: np.ndarray, xy: np.ndarray, labels, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    queries = None if len(x) <= 10_000 else np.sort(rng.choice(len(x), 2000, replace=False))
    random_xy = rng.random((len(x), 2)).astype(np.float32)
    out = {"kept10": ml.neighbour_share(x, xy, 10, queries), "random10": ml.neighbour_share(x, random_xy, 10, queries)}
    if labels is not None:
        idx, _ = ml.exact_neighbours(np.asarray(xy, np.float32), 10)
        out["same_class10"] = float(np.mean(labels[idx] == labels[:, None]))
        out["same_class_random"] = float(np.mean([np.mean(labels == c) ** 2 for c in np.unique(labels)]) * len(np.unique(labels)))
    return out


def case(spec: dict) -> dict:
    """Run one case in this (child) process."""
    t0 = time.perf_counter()
    if spec["method"].startswith("umap"):
        import umap  # noqa: F401  (import and numba's compilation timed apart from the layout)
    imported = time.perf_counter() - t0
    x, labels = data(spec["data"], spec["n"])
    ids = np.arange(len(x), dtype=np.int64)
    with PeakMemory() as mem:
        t = time.perf_counter()
        if spec["method"] == "kinscope":
            xy, _ = ml.layout(ids, lambda i: x[i], seed=spec["seed"], sample=spec.get("sample", ml.SAMPLE))
        else:
            xy = method(spec["method"], x, spec["seed"])
        seconds = time.perf_counter() - t
    return {**spec, "n": len(x), "seconds": round(seconds, 1), "import_s": round(imported, 1),
            "added_mb": round(mem.added / 2**20), "data_mb": round(x.nbytes / 2**20),
            **{k: round(v, 3) for k, v in shares(x, np.asarray(xy, np.float32), labels, spec["seed"]).items()}}


def run_child(spec: dict) -> dict:
    out = subprocess.run([sys.executable, __file__, "_case", json.dumps(spec)], capture_output=True, text=True)
    lines = out.stdout.strip().splitlines()
    if out.returncode or not lines:
        return {**spec, "error": (out.stderr.strip().splitlines() or ["no output"])[-1]}
    return json.loads(lines[-1])


def show(row: dict) -> None:
    if "error" in row:
        print(f"{row['data']:>8} {row['n']:>9,} {row['method']:<14} failed: {row['error']}", flush=True)
        return
    extra = f"  same class {row['same_class10']:.2f} (chance {row['same_class_random']:.2f})" if "same_class10" in row else ""
    sample = f" s={row['sample']:,}" if "sample" in row else ""
    print(f"{row['data']:>8} {row['n']:>9,} {row['method'] + sample:<22} {row['seconds']:>7.1f} s "
          f"(import {row['import_s']:.1f} s) {row['added_mb']:>6} MB over {row['data_mb']} MB data  "
          f"kept@10 {row['kept10']:.3f} (random {row['random10']:.4f}){extra}  load {os.getloadavg()[0]:.1f}",
          flush=True)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("what", choices=["compare", "scale", "_case"])
    parser.add_argument("spec", nargs="?")
    parser.add_argument("--sizes", type=int, nargs="+", default=[10_000, 100_000, 1_000_000])
    parser.add_argument("--methods", nargs="+", default=["pca2", "sklearn-tsne", "opentsne", "umap"])
    parser.add_argument("--sample", type=int, default=ml.SAMPLE, help="items laid out by t-SNE (the rest placed)")
    parser.add_argument("--full-limit", type=int, default=0, help="sizes up to this are also laid out whole")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    if args.what == "_case":
        print(json.dumps(case(json.loads(args.spec))))
        return
    print(f"{os.cpu_count()} cores; load average {os.getloadavg()[0]:.2f} at start", flush=True)
    if args.what == "compare":
        for name, n in (("digits", 1797), ("synth", 10_000)):
            for m in args.methods:
                show(run_child({"data": name, "n": n, "method": m, "seed": args.seed}))
        return
    for n in args.sizes:
        show(run_child({"data": "synth", "n": n, "method": "kinscope", "seed": args.seed, "sample": args.sample}))
        if args.sample < n <= args.full_limit:
            show(run_child({"data": "synth", "n": n, "method": "kinscope", "seed": args.seed, "sample": n}))


if __name__ == "__main__":
    main()
