#!/usr/bin/env python3
"""Bounded load test of the page's server on loopback: concurrent clients, mixed requests, then attacks.

Starts `kinscope serve` on a free 127.0.0.1 port. The load phase sends a fixed number of mixed
search / explain / thumbnail requests from N client threads and prints throughput, latency
percentiles, errors and the server's resident memory. The hostile phase (scripts/hostile_phase.py)
tries what a web page in the user's browser could: a foreign Host (DNS rebinding), foreign origins,
oversized uploads and a flood of the largest accepted uploads, and prints what got through and the
server's memory. It stops by itself (request counts and a time cap); exit status 1 if anything failed.

    .venv/bin/python scripts/load_test.py --db demo-db --clients 8 --requests 400
    .venv/bin/python scripts/load_test.py --db demo-db --phase hostile --uploads 64
"""
from __future__ import annotations

import argparse
import json
import random
import statistics
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def rss_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def get(url: str, timeout: float = 60.0, headers: dict | None = None, data: bytes | None = None) -> tuple[int, bytes]:
    try:
        with urllib.request.urlopen(urllib.request.Request(url, data=data, headers=headers or {}), timeout=timeout) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read()


def start_server(db: str, port: int) -> subprocess.Popen:
    # `python -m index` is the kinscope command of whichever environment runs this script.
    proc = subprocess.Popen([sys.executable, "-m", "index", "serve", "--db", db, "--port", str(port)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd=ROOT)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        try:
            if get(f"http://127.0.0.1:{port}/api/info", 2)[0] == 200:
                return proc
        except OSError:
            time.sleep(0.3)
    proc.kill()
    raise SystemExit("the server did not start")


def load_phase(base: str, pid: int, args) -> bool:
    """Mixed search / explain / thumbnail requests from args.clients threads; True when none failed."""
    ids = [i["id"] for i in json.loads(get(f"{base}/api/items?limit=500")[1])["items"]]
    layers = [l["name"] for l in json.loads(get(f"{base}/api/info")[1])["layers"]]
    for i in ids[:8]:  # warm-up: a few searches and thumbnails; an explanation loads the model
        get(f"{base}/api/search?item={i}&k=12")
        get(f"{base}/media/items/{i}/thumbnail")
    get(f"{base}/api/explain?item={ids[0]}&match={ids[1]}")
    rss_start = rss_mb(pid)
    rng = random.Random(7)
    plan = [rng.choices(["search", "explain", "thumbnail"], [0.5, 0.2, 0.3])[0] for _ in range(args.requests)]
    lock, results = threading.Lock(), []
    stop_at = time.monotonic() + args.max_seconds

    def client(seed: int) -> None:
        r = random.Random(seed)
        while time.monotonic() < stop_at:
            with lock:
                if not plan:
                    return
                kind = plan.pop()
            a, b = r.choice(ids), r.choice(ids)
            url = {
                "search": f"{base}/api/search?item={a}&k=24&layer={r.choice(layers)}",
                "explain": f"{base}/api/explain?item={a}&match={b}",
                "thumbnail": f"{base}/media/items/{a}/thumbnail?size={r.choice([128, 256])}",
            }[kind]
            t0 = time.perf_counter()
            try:
                status, _ = get(url)
            except OSError:
                status = 599
            with lock:
                results.append((kind, status, time.perf_counter() - t0))

    samples: list[tuple[int, float]] = []  # (requests done, resident MB)

    def sampler() -> None:
        while any(t.is_alive() for t in threads):
            samples.append((len(results), rss_mb(pid)))
            time.sleep(0.5)

    t0 = time.perf_counter()
    threads = [threading.Thread(target=client, args=(s,)) for s in range(args.clients)]
    for t in threads:
        t.start()
    watcher = threading.Thread(target=sampler)
    watcher.start()
    for t in threads:
        t.join()
    watcher.join()
    report(results, samples, args.clients, time.perf_counter() - t0, rss_start, rss_mb(pid))
    return not any(r[1] >= 400 for r in results)


def report(results, samples, clients: int, wall: float, rss_start: float, rss_end: float) -> None:
    print(f"{len(results)} requests from {clients} clients in {wall:.1f} s: {len(results) / wall:.1f} requests/s")
    print(f"{'kind':<10} {'count':>6} {'errors':>6} {'p50 ms':>8} {'p95 ms':>8} {'p99 ms':>8}")
    for kind in ("search", "explain", "thumbnail", "all"):
        rows = [r for r in results if kind == "all" or r[0] == kind]
        if not rows:
            continue
        lat = sorted(r[2] * 1000 for r in rows)
        q = lambda f: lat[min(len(lat) - 1, int(f * len(lat)))]  # noqa: E731
        errors = sum(1 for r in rows if r[1] >= 400)
        print(f"{kind:<10} {len(rows):>6} {errors:>6} {q(0.5):>8.0f} {q(0.95):>8.0f} {q(0.99):>8.0f}")
    print(f"server resident memory: {rss_start:.0f} MB after warm-up, {rss_end:.0f} MB at the end "
          f"({rss_end - rss_start:+.0f} MB)")
    marks = [samples[min(len(samples) - 1, int(f * len(samples)))] for f in (0.25, 0.5, 0.75)] if samples else []
    print("  during the run: " + ", ".join(f"{mb:.0f} MB after {n} requests" for n, mb in marks))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--db", required=True, help="an indexed archive folder")
    ap.add_argument("--phase", choices=["load", "hostile", "both"], default="both")
    ap.add_argument("--clients", type=int, default=8)
    ap.add_argument("--requests", type=int, default=400)
    ap.add_argument("--uploads", type=int, default=64, help="hostile phase: uploads of the largest accepted JPEG")
    ap.add_argument("--png-uploads", type=int, default=16, help="hostile phase: uploads of a 60-megapixel PNG")
    ap.add_argument("--max-seconds", type=float, default=600)
    args = ap.parse_args()
    sys.path.insert(0, str(ROOT))
    sys.path.insert(0, str(ROOT / "scripts"))
    from hostile_phase import hostile_phase
    from web.serve import free_port

    port = free_port()
    base = f"http://127.0.0.1:{port}"
    proc = start_server(args.db, port)
    ok = True
    try:
        if args.phase in ("load", "both"):
            ok = load_phase(base, proc.pid, args) and ok
        if args.phase in ("hostile", "both"):
            ok = hostile_phase(base, port, proc.pid, args) and ok
    finally:
        proc.terminate()
        proc.wait(timeout=30)
    sys.exit(0 if ok else 1)


if __name__ == "__main__":
    main()
