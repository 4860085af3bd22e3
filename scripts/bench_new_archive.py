"""A new archive's whole `kinscope index` command: with an empty per-user model cache, against one
that already holds the model and the resolved settings (one export per model, not per archive).

    .venv/bin/python scripts/bench_new_archive.py [--folder demo_archive] [--rounds 3]

Each run is `kinscope index FOLDER --db NEW` in a fresh process on a fresh database folder, timed
from start to exit. "empty cache": KINSCOPE_CACHE_DIR points to a new empty folder, so the layers are
resolved and the ONNX model exported in child processes that load torch (as every new archive did
before the per-user cache). "cached": the cache filled by an earlier run. Rounds alternate the
order; the medians and their ratio are printed. Nothing is asserted.
"""
from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def index_once(folder: Path, db: Path, cache: Path) -> float:
    env = {**os.environ, "KINSCOPE_CACHE_DIR": str(cache)}
    start = time.perf_counter()
    out = subprocess.run([sys.executable, "-m", "index", "index", str(folder), "--db", str(db)], cwd=ROOT,
                         env=env, capture_output=True, text=True)
    seconds = time.perf_counter() - start
    if out.returncode != 0:
        raise SystemExit(out.stderr)
    return seconds


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--folder", type=Path, default=ROOT / "demo_archive")
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args()
    files = sum(1 for p in args.folder.rglob("*") if p.is_file())
    with tempfile.TemporaryDirectory(prefix="kinscope-bench-new-") as tmp:
        tmp = Path(tmp)
        shared = tmp / "cache-shared"
        index_once(args.folder, tmp / "db-fill", shared)  # fills the shared cache
        times = {"empty": [], "cached": []}
        print(f"{files} files in {args.folder}; load average {os.getloadavg()[0]:.2f}", flush=True)
        for r in range(args.rounds):
            order = ["empty", "cached"] if r % 2 == 0 else ["cached", "empty"]
            for kind in order:
                cache = tmp / f"cache-empty-{r}" if kind == "empty" else shared
                times[kind].append(index_once(args.folder, tmp / f"db-{kind}-{r}", cache))
            print(f"  round {r + 1}: empty cache {times['empty'][-1]:.1f} s, cached {times['cached'][-1]:.1f} s",
                  flush=True)
        empty, cached = statistics.median(times["empty"]), statistics.median(times["cached"])
        print(f"\nwhole `kinscope index` of a new archive, median of {args.rounds}:")
        print(f"  empty model cache (resolve + export in child processes)  {empty:6.1f} s")
        print(f"  model and settings cached                               {cached:6.1f} s   "
              f"{empty / cached:.2f}x faster")
        print(f"load average after: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
