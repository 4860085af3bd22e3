"""`scripts/bench_index.py --whole`: the whole `kinscope index` command against the whole naive script.

    .venv/bin/python scripts/bench_index.py --whole [--photos 480] [--repeat 3] [--work /tmp/kinscope-bench]

Each run is a fresh process timed from start to exit, on the same photo-sized JPEGs (3000 x 2000,
bench_index.make_set), as a user meets it:

- naive: the one-image-at-a-time script (bench_index.naive: read, SHA-256, full-size decode, resize,
  torch eager with a batch of one, GeM pooling) over every file, its imports and model loading
  included, no warm-up; run twice, with torch on every core (torch's default, what a straightforward
  script gets) and on one thread. On a machine other work shares, torch's threads on every core can
  wait on each other for seconds per image (seen here: 0.4-3.4 s a forward pass on 2 threads against
  0.05-0.14 s on 1 while other processes ran), so the faster of the two in each round is the baseline:
  the comparison never profits from that. --naive-limit S stops a naive run after S seconds and
  counts it as S (a lower bound; the faster run is the baseline, so one stopped run changes nothing);
- cached: `kinscope index FOLDER --db NEW` with KINSCOPE_CACHE_DIR pointing at a per-user model cache
  filled once before timing (a user's second archive: no torch in any process);
- empty: the same with an empty cache folder (the first archive ever: the layers are resolved and the
  ONNX model exported in one child process that loads torch).

The four runs alternate within each round (the order turns round by round); the ratios naive / kinscope
are printed per round and as medians. The kinscope command's stderr lines are stamped with the time
since its start and its summary line is parsed, so each run is split into: start (interpreter and
imports, until the command's first line), preparation (opening the new database, scan, catalog,
model), the embedding loop (decode and inference, checkpoints, final store write) and the exit (after
the summary line until the process ends). Nothing is asserted.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import statistics
import subprocess
import sys
import threading
import time
from pathlib import Path

from bench_index import ROOT, Others, load, machine, make_set
from index.ingest.pipeline import cores

SUMMARY = re.compile(r"([\d.]+) images/s while embedding with (\w+) \(([\d.]+) s\); ([\d.]+) images/s for the whole "
                     r"command \(([\d.]+) s")


def photo_folder(work: Path, n: int) -> Path:
    """A folder holding exactly the n generated photos (hard links to the first n when the set is larger)."""
    folder = work / "photos"
    paths = make_set(folder, n, (3000, 2000), 1)
    if len(list(folder.glob("*.jpg"))) == n:
        return folder
    exact = work / f"photos-first-{n}"
    exact.mkdir(exist_ok=True)
    for p in map(Path, paths):
        if not (exact / p.name).exists():
            os.link(p, exact / p.name)
    return exact


def naive_whole(paths: list[str], work: Path, threads: int, limit: float | None) -> dict:
    """The naive script over every file as a fresh process, torch on `threads`: wall seconds, its loop's share.
    A run longer than `limit` seconds is stopped there and counts as `limit` (a lower bound: "stopped")."""
    listing = work / "naive-whole-paths.txt"
    listing.write_text("\n".join(paths))
    cmd = [sys.executable, str(ROOT / "scripts" / "bench_index.py"), "--naive-of", str(listing), "--naive-whole",
           "--naive-threads", str(threads)]
    t = time.perf_counter()
    try:
        out = subprocess.run(cmd, capture_output=True, text=True, check=True, cwd=ROOT, timeout=limit)
    except subprocess.TimeoutExpired:
        return {"wall": limit, "stopped": True}
    wall = time.perf_counter() - t
    report = json.loads(out.stdout.strip().splitlines()[-1])
    return {"wall": wall, "loop": report["loop_seconds"], "start": wall - report["loop_seconds"]}


def kinscope_whole(folder: Path, db: Path, cache: Path) -> dict:
    """`kinscope index FOLDER --db DB` as a fresh process with this model cache; its stderr lines stamped."""
    shutil.rmtree(db, ignore_errors=True)
    env = {**os.environ, "KINSCOPE_CACHE_DIR": str(cache)}
    cmd = [sys.executable, "-m", "index", "index", str(folder), "--db", str(db)]
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    stamped: list[tuple[float, str]] = []

    def follow() -> None:
        for line in proc.stderr:
            stamped.append((time.perf_counter() - t0, line.rstrip()))

    reader = threading.Thread(target=follow, daemon=True)
    reader.start()
    stdout = proc.stdout.read()
    proc.wait()
    wall = time.perf_counter() - t0
    reader.join()
    if proc.returncode != 0:
        raise SystemExit("kinscope index failed:\n" + "\n".join(line for _, line in stamped))
    match = SUMMARY.search(stdout)
    if not match:
        raise SystemExit(f"no summary line in kinscope's output:\n{stdout}")
    loop, engine, command = float(match.group(3)), match.group(2), float(match.group(5))
    embedded = int(re.search(r"(\d+) embedded", stdout).group(1))
    shutil.rmtree(db, ignore_errors=True)
    # The command's first line ("new database ...: preparing the network") comes as its clock starts.
    start = stamped[0][0] if stamped and "new database" in stamped[0][1] else float("nan")
    return {"wall": wall, "engine": engine, "embedded": embedded, "loop": loop, "start": start,
            "prepare": command - loop, "tail": wall - start - command, "lines": stamped}


def split(run: dict) -> str:
    """Where a run's seconds went."""
    if run.get("stopped"):
        return "stopped at the time limit (--naive-limit): at least this long"
    if "prepare" not in run:
        return f"start {run['start']:.1f} s + loop {run['loop']:.1f} s"
    return (f"start {run['start']:.1f} s + preparation {run['prepare']:.1f} s + loop {run['loop']:.1f} s "
            f"({run['engine']}) + exit {run['tail']:.1f} s")


def whole_main(args) -> None:
    work = Path(args.work)
    n = args.photos or 480
    print(f"machine: {machine()}")
    print(f"load average at start: {load()}", flush=True)
    folder = photo_folder(work, n)
    paths = sorted(str(p) for p in folder.glob("*.jpg"))
    mb = sum(os.path.getsize(p) for p in paths) / len(paths) / 1e6
    print(f"set: {len(paths)} JPEGs of 3000 x 2000 in {folder}, {mb:.2f} MB each on average")
    shared = work / "whole-cache-shared"
    shutil.rmtree(shared, ignore_errors=True)
    fill = kinscope_whole(folder, work / "whole-db-fill", shared)  # the per-user cache, filled once
    print(f"cache filled by a first run: {fill['wall']:.1f} s ({split(fill)})", flush=True)

    kinds = ["naive", "cached", "naive1", "empty"]
    runs: dict[str, list[dict]] = {k: [] for k in kinds + ["best"]}
    others = 0.0
    for r in range(args.repeat):
        order = kinds[r % 4:] + kinds[:r % 4]
        print(f"\n-- round {r + 1} (load average {load()}), order {', '.join(order)}", flush=True)
        for kind in order:
            with Others() as o:
                if kind.startswith("naive"):
                    result = naive_whole(paths, work, 1 if kind == "naive1" else cores(), args.naive_limit)
                else:
                    cache = shared if kind == "cached" else work / f"whole-cache-empty-{r}"
                    if kind == "empty":
                        shutil.rmtree(cache, ignore_errors=True)
                    result = kinscope_whole(folder, work / f"whole-db-{kind}", cache)
                    if kind == "empty":
                        shutil.rmtree(cache, ignore_errors=True)
            others = max(others, o.share)
            runs[kind].append(result)
            print(f"  {kind:6s} {result['wall']:6.1f} s  {n / result['wall']:5.1f} img/s   {split(result)}", flush=True)
        if runs["naive"][-1].get("stopped") and runs["naive1"][-1].get("stopped"):
            print("  both naive runs were stopped: this round's ratios are lower bounds", flush=True)
        runs["best"].append(min(runs["naive"][-1], runs["naive1"][-1], key=lambda run: run["wall"]))
        naive = runs["best"][-1]["wall"]
        print(f"  faster naive / cached {naive / runs['cached'][-1]['wall']:.2f}x, "
              f"faster naive / empty {naive / runs['empty'][-1]['wall']:.2f}x", flush=True)
    report(runs, n, args.repeat, others)
    print("\nstderr of the last cached and empty runs, seconds since start:")
    for kind in ("cached", "empty"):
        for at, line in runs[kind][-1]["lines"]:
            print(f"  {kind:6s} {at:6.1f}  {line}")


def report(runs: dict[str, list[dict]], n: int, rounds: int, others: float) -> None:
    med = {k: statistics.median(r["wall"] for r in v) for k, v in runs.items()}
    ratio = {k: statistics.median(a["wall"] / b["wall"] for a, b in zip(runs["best"], runs[k])) for k in runs}
    print(f"\nload average at end: {load()}; other processes took up to {others:.0%} of the CPU")
    print(f"\nmedian of {rounds} rounds, {n} photo-sized JPEGs, each a fresh process from start to exit:\n")
    print("| run | seconds | images/s | faster naive / this (median of rounds) | where the time went (median run) |")
    print("|---|---|---|---|---|")
    for kind, label in (("naive", "naive script, torch on every core"), ("naive1", "naive script, torch on 1 thread"),
                        ("cached", "`kinscope index`, model cache filled"),
                        ("empty", "`kinscope index`, empty model cache")):
        middle = sorted(runs[kind], key=lambda r: r["wall"])[len(runs[kind]) // 2]
        print(f"| {label} | {med[kind]:.1f} | {n / med[kind]:.1f} | {ratio[kind]:.2f}x | {split(middle)} |")
