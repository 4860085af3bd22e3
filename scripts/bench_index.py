"""Indexing throughput, side by side in one run: a naive pipeline against kinscope's, and the machine's limit.

    .venv/bin/python scripts/bench_index.py [--photos 400] [--small 1000] [--repeat 3] [--work /tmp/kinscope-bench]
    .venv/bin/python scripts/bench_index.py --whole [--photos 480] [--repeat 3]   # the whole command, see below

Two generated sets of JPEGs (photo-sized, 3000 x 2000, and small, 640 x 480) are made from the
scikit-image / scikit-learn sample photographs (random crops, resized, with sensor-like noise so the
files are about 1.5 MB at quality 90, like camera JPEGs of that size). On each set, in this order:

- naive: one file at a time in one fresh process: read, hash, full-size decode, resize, torch eager
  forward (batch of 1, torch using all cores), GeM pooling;
- kinscope: `kinscope index` in a fresh process on a fresh database (scan, catalog, decode workers,
  batched ONNX Runtime, FAISS stores, checkpoints), the ONNX model exported beforehand (a one-off per
  database); the rate is over the indexing job, the command's start-up is printed beside it;
- decode only: kinscope's decode workers, one per core, nothing else running;
- inference only: batched ONNX Runtime (and torch, batched and one at a time, for the engine choice) on
  decoded pixels, all cores, normalisation and pooling included;
- limit = 1 / (1/decode + 1/inference): the rate if decoding and inference shared the cores perfectly.

Prints images per second, the ratio kinscope / naive and kinscope as a fraction of the limit, each
figure the best of --repeat interleaved rounds, with the share of CPU other processes took meanwhile.
Nothing here is asserted; run it on a quiet machine.

--whole (scripts/bench_index_whole.py) times whole commands instead, each a fresh process from start to
exit on the photo-sized set: the naive script over every file (imports and model loading included)
against `kinscope index FOLDER --db NEW` with the per-user model cache filled and with it empty.
"""
from __future__ import annotations

import argparse
import hashlib
import os
import platform
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def machine() -> str:
    cpu = "unknown CPU"
    try:
        for line in open("/proc/cpuinfo"):
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    from index.ingest.pipeline import cores

    return f"{cpu}, {cores()} cores, {mem:.0f} GiB RAM, {platform.system()} {platform.release()}, Python {platform.python_version()}"


def load() -> str:
    return " ".join(f"{v:.2f}" for v in os.getloadavg())


class Others:
    """Share of the machine's CPU time used by other processes while a phase ran (from /proc/stat)."""

    def __enter__(self):
        self.t0, self.mine0, self.busy0 = time.perf_counter(), self._mine(), self._busy()
        return self

    def __exit__(self, *exc):
        wall = time.perf_counter() - self.t0
        others = (self._busy() - self.busy0) - (self._mine() - self.mine0)
        self.share = max(0.0, others / (wall * os.cpu_count()))

    @staticmethod
    def _mine() -> float:
        t = os.times()
        return t.user + t.system + t.children_user + t.children_system

    @staticmethod
    def _busy() -> float:
        fields = [int(v) for v in open("/proc/stat").readline().split()[1:]]
        return (sum(fields[:8]) - fields[3] - fields[4]) / os.sysconf("SC_CLK_TCK")


def sources() -> list[Image.Image]:
    from skimage import data
    from sklearn.datasets import load_sample_images

    images = [Image.fromarray(a) for a in load_sample_images().images]
    for name in ("astronaut", "coffee", "chelsea", "rocket", "immunohistochemistry", "hubble_deep_field"):
        images.append(Image.fromarray(getattr(data, name)()).convert("RGB"))
    return images


def make_set(folder: Path, n: int, size: tuple[int, int], seed: int) -> list[str]:
    """n JPEGs of `size`, quality 90, deterministic; kept between runs."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = [folder / f"{i:05d}.jpg" for i in range(n)]
    if all(p.exists() for p in paths):
        return [str(p) for p in paths]
    rng = np.random.default_rng(seed)
    src = sources()
    for i, path in enumerate(paths):
        if path.exists():
            continue
        im = src[i % len(src)]
        cw, ch = int(im.width * rng.uniform(0.5, 0.9)), int(im.height * rng.uniform(0.5, 0.9))
        x0, y0 = int(rng.integers(0, im.width - cw + 1)), int(rng.integers(0, im.height - ch + 1))
        big = im.crop((x0, y0, x0 + cw, y0 + ch)).resize(size, Image.BICUBIC)
        noise = rng.normal(0, 7, (size[1], size[0], 3))  # sensor-like noise: camera-sized files
        arr = np.clip(np.asarray(big, np.float32) + noise, 0, 255).astype(np.uint8)
        Image.fromarray(arr).save(path, "JPEG", quality=90)
    return [str(p) for p in paths]


def naive(paths: list[str], embedder) -> float:
    """Images per second, one at a time: full decode, torch eager, batch of 1."""
    from index.images.decode import open_image
    from index.model.torch_engine import pool

    t = time.perf_counter()
    for p in paths:
        data = open(p, "rb").read()
        hashlib.sha256(data).hexdigest()
        x = embedder.preprocess(open_image(data).image)[None]
        pool(embedder.reference.maps(x), embedder.p)
    return len(paths) / (time.perf_counter() - t)


def naive_in_fresh_process(paths: list[str], work: Path) -> float:
    """naive() in a new Python process: nothing kinscope does to the process (allocator settings, an
    ONNX export, which leaves glibc's mmap threshold raised) may flatter or slow the baseline."""
    import json
    import subprocess

    listing = work / "naive-paths.txt"
    listing.write_text("\n".join(paths))
    out = subprocess.run([sys.executable, __file__, "--naive-of", str(listing)], capture_output=True, text=True,
                         check=True, cwd=ROOT)
    return json.loads(out.stdout.strip().splitlines()[-1])["rate"]


def naive_main(listing: str, whole: bool = False, threads: int | None = None) -> None:
    """The naive pipeline in this process; whole: every file, no warm-up, as a user's script runs it;
    threads: torch's threads (default: one per core)."""
    import json

    import torch

    from index.model.backbones import get_backbone
    from index.model.torch_embedder import Embedder
    from index.model.layers import resolve_layers
    from index.ingest.pipeline import cores

    threads = threads or cores()  # all cores for torch by default, as a straightforward script would have
    torch.set_num_threads(threads)
    backbone = get_backbone()
    model = backbone.load()
    embedder = Embedder(backbone, model, resolve_layers(backbone, model, list(backbone.default_layers)),
                        engine="torch", threads=threads)
    paths = [p for p in Path(listing).read_text().split("\n") if p]
    if whole:
        t = time.perf_counter()
        rate = naive(paths, embedder)
        print(json.dumps({"rate": rate, "loop_seconds": time.perf_counter() - t}))
        return
    naive(paths[:2], embedder)  # warm
    print(json.dumps({"rate": naive(paths, embedder)}))


def kinscope(paths: list[str], work: Path, cache: Path, batch_size: int, workers: int | None) -> dict:
    """`kinscope index` in a fresh process on a fresh database (the ONNX model exported beforehand)."""
    import json
    import subprocess

    from index.api import Archive

    folder = Path(paths[0]).parent
    db = work / f"db-{folder.name}"
    shutil.rmtree(db, ignore_errors=True)
    Archive.open(db, create=True).close()
    shutil.copytree(cache, db / "engines")  # the one-off export, done before timing
    cmd = [sys.executable, "-m", "index", "index", str(folder), "--db", str(db), "--engine", "onnx", "-q", "--json",
           "--batch-size", str(batch_size)] + (["--workers", str(workers)] if workers else [])
    t = time.perf_counter()
    out = subprocess.run(cmd, capture_output=True, text=True, check=True, cwd=ROOT)
    wall = time.perf_counter() - t
    report = json.loads(out.stdout)
    with Archive.open(db) as archive:
        per_image = archive.info()["index_bytes_per_image"]
    # rate: over the indexing job itself; wall: the whole command, with Python, torch and model start-up
    return {"rate": report["embedded"] / report["seconds"], "wall": report["embedded"] / wall, "report": report,
            "bytes_per_image": per_image}


def decode_only(paths: list[str], size: int, workers: int) -> float:
    from index.ingest.decode_pool import DecodePool

    with DecodePool(size, workers) as pool:
        list(pool.map(paths[:4]))  # workers warm
        t = time.perf_counter()
        n = sum(1 for _, r in pool.map(paths) if "pixels" in r)
        return n / (time.perf_counter() - t)


def inference_only(embedder, pixels: np.ndarray, batch_size: int, rounds: int) -> float:
    embedder.embed_pixels(pixels[:batch_size])  # warm
    t = time.perf_counter()
    n = 0
    for _ in range(rounds):
        for start in range(0, len(pixels), batch_size):
            embedder.embed_pixels(pixels[start:start + batch_size])
            n += len(pixels[start:start + batch_size])
    return n / (time.perf_counter() - t)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--photos", type=int, default=None, help="photo-sized JPEGs (3000 x 2000; default 400, 480 with "
                    "--whole)")
    ap.add_argument("--small", type=int, default=1000, help="small JPEGs (640 x 480)")
    ap.add_argument("--naive", type=int, default=60, help="images per set timed for the naive pipeline")
    ap.add_argument("--batch-size", type=int, default=8)
    ap.add_argument("--workers", type=int, default=None, help="decode workers (default: one per core)")
    ap.add_argument("--repeat", type=int, default=3, help="rounds; each figure is the best round")
    ap.add_argument("--work", default=os.path.join(tempfile.gettempdir(), "kinscope-bench"))
    ap.add_argument("--whole", action="store_true", help="the whole `kinscope index` command as a user runs it "
                    "(fresh process, new database; model cache filled, then empty) against the whole naive script, "
                    "on the photo-sized set only (--photos, default 480 in this mode); --repeat rounds, alternating")
    ap.add_argument("--naive-limit", type=float, help="with --whole: stop a naive run after this many seconds "
                    "(it then counts as that long, a lower bound)")
    ap.add_argument("--naive-of", help=argparse.SUPPRESS)  # internal: the naive pipeline on a list of paths
    ap.add_argument("--naive-whole", action="store_true", help=argparse.SUPPRESS)  # internal: every file, no warm-up
    ap.add_argument("--naive-threads", type=int, help=argparse.SUPPRESS)  # internal: torch threads of the naive run
    args = ap.parse_args()
    if args.naive_of:
        return naive_main(args.naive_of, whole=args.naive_whole, threads=args.naive_threads)
    if args.whole:
        from bench_index_whole import whole_main

        return whole_main(args)

    from index.model.backbones import get_backbone
    from index.model.torch_embedder import Embedder
    from index.model.layers import resolve_layers
    from index.ingest.pipeline import configure_threads, cores
    from index.ingest.decode_task import read_file

    work = Path(args.work)
    n_cores = cores()
    print(f"machine: {machine()}")
    print(f"load average at start: {load()}")
    sets = {
        "photo 3000x2000": make_set(work / "photos", args.photos or 400, (3000, 2000), 1),
        "small 640x480": make_set(work / "small", args.small, (640, 480), 2),
    }
    for name, paths in sets.items():
        mb = sum(os.path.getsize(p) for p in paths) / len(paths) / 1e6
        print(f"set {name}: {len(paths)} JPEGs, {mb:.2f} MB each on average")

    backbone = get_backbone()
    model = backbone.load()
    layers = resolve_layers(backbone, model, list(backbone.default_layers))
    cache = work / "engines"
    configure_threads(n_cores)
    torch_embedder = Embedder(backbone, model, layers, engine="torch", threads=n_cores)
    onnx_embedder = Embedder(backbone, model, layers, cache_dir=cache, threads=n_cores)
    t = time.perf_counter()
    fresh = not list(cache.glob("*.onnx"))
    onnx_embedder.use_engine("onnx", may_export=True, threads=n_cores)
    if fresh:
        print(f"ONNX export (once per database): {time.perf_counter() - t:.1f} s")
    pixels = {name: np.stack([read_file(p, backbone.input_size)["pixels"] for p in paths[:64]])
              for name, paths in sets.items()}

    best: dict = {}
    others: dict = {}
    peaks: dict = {}

    def keep(key, value, share, better=max):
        best[key] = value if key not in best else better(best[key], value, key=lambda v: v if not isinstance(v, dict) else v["rate"])
        others[key] = max(others.get(key, 0.0), share)

    for round_no in range(1, args.repeat + 1):
        print(f"\n-- round {round_no} (load average {load()})", flush=True)
        for name, paths in sets.items():
            configure_threads(n_cores)
            with Others() as o:
                r = naive_in_fresh_process(paths[:args.naive], work)
            keep((name, "naive"), r, o.share)
            with Others() as o:
                k = kinscope(paths, work, cache, args.batch_size, args.workers)
            keep((name, "kinscope"), k, o.share)
            peaks.setdefault(name, []).append((k["report"]["peak_rss"], k["report"]["peak_rss_workers"]))
            with Others() as o:
                d = decode_only(paths, backbone.input_size, args.workers or n_cores)
            keep((name, "decode"), d, o.share)
            configure_threads(n_cores)
            with Others() as o:
                i = inference_only(onnx_embedder, pixels[name], args.batch_size, rounds=3)
            keep((name, "onnx"), i, o.share)
            with Others() as o:
                it = inference_only(torch_embedder, pixels[name], args.batch_size, rounds=1)
            keep((name, "torch"), it, o.share)
            with Others() as o:
                it1 = inference_only(torch_embedder, pixels[name][:32], 1, rounds=1)
            keep((name, "torch1"), it1, o.share)
            print(f"{name}: naive {r:.1f}, kinscope {k['rate']:.1f} (whole command {k['wall']:.1f}; peak memory "
                  f"{k['report']['peak_rss'] / 2**20:.0f} MB), decode {d:.1f}, inference ONNX {i:.1f} / torch {it:.1f} "
                  f"(batch 1: {it1:.1f}) img/s", flush=True)

    print(f"\nload average at end: {load()}")
    print(f"\nbest of {args.repeat} rounds; batch {args.batch_size}; {args.workers or n_cores} decode workers; "
          f"inference and torch on {n_cores} threads")
    print("\n| set | naive img/s | kinscope img/s | kinscope / naive | decode only img/s | inference only img/s "
          "(ONNX; torch; torch batch 1) | limit img/s | kinscope / limit | peak memory: indexer + workers (worst round) "
          "| other processes' CPU |")
    print("|---|---|---|---|---|---|---|---|---|---|")
    for name in sets:
        r_naive, k, r_decode = best[(name, "naive")], best[(name, "kinscope")], best[(name, "decode")]
        r_onnx, r_torch, r_torch1 = best[(name, "onnx")], best[(name, "torch")], best[(name, "torch1")]
        limit = 1 / (1 / r_decode + 1 / r_onnx)
        worst = max(peaks[name])
        busy = max(v for (n, _), v in others.items() if n == name)
        print(f"| {name} | {r_naive:.1f} | {k['rate']:.1f} | {k['rate'] / r_naive:.2f}x | {r_decode:.1f} | "
              f"{r_onnx:.1f}; {r_torch:.1f}; {r_torch1:.1f} | {limit:.1f} | {k['rate'] / limit:.0%} | "
              f"{worst[0] / 2**20:.0f} + {worst[1] / 2**20:.0f} MB | up to {busy:.0%} |")
    k = best[(next(iter(sets)), "kinscope")]
    print(f"\nkinscope on photo-sized JPEGs: {k['rate'] * 3600:,.0f} images per hour "
          f"({k['wall'] * 3600:,.0f} counting the command's start-up on {len(sets[next(iter(sets))])} images); "
          f"index memory {k['bytes_per_image']:.0f} bytes per image while the stores are flat")


if __name__ == "__main__":
    main()
