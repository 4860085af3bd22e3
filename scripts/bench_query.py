"""A query as a user waits for it: `kinscope search FILE` against `kinscope search --id N`, and the
browser page's first search after `kinscope serve` says it is ready against later ones.

    .venv/bin/python scripts/bench_query.py [--db demo-db] [--runs 7] [--queries 8]

Without --db the demo archive (demo_archive/) is indexed into a temporary folder first (the run
exports the ONNX model, as a first `kinscope index` of 254 images does). The queries are files the
archive does not hold: demo swatches re-saved at 80% size as JPEG (quality 85) in a temporary folder.

1. Command line, each command a fresh process as a user runs it (median of --runs, alternating):
   search by id (no model), search by file on the cached ONNX model (kinscope's default when the
   model is cached), and search by file with torch (the archive's engine preference set to torch in a
   copy of the database folder: how every search by file ran before).
2. The page: `kinscope serve` on a free 127.0.0.1 port, started as a subprocess; the clock starts
   when its first line says it is ready. The first query (upload + search, as the page sends them),
   then --queries more (median), then, --explain-after seconds after the ready line, two explanations
   (the archive's mean cell feature, which the first explanation an archive ever gets computes and
   keeps in the database folder, is made beforehand: every server gets a copy with it). Three servers side by side: the default
   (query model warmed, torch loaded for explanations in a background thread), the same without the
   background thread, and the server as it was before (nothing warmed, queries by torch: the
   torch-preferring copy). Every server is stopped at the end.

Nothing is asserted; times depend on the machine and its load (printed).
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import urllib.parse
import urllib.request
import uuid
from pathlib import Path

from PIL import Image

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
PY = [sys.executable]
CLI = PY + ["-m", "index"]


def queries(folder: Path, n: int) -> list[Path]:
    """n held-out query files: demo images re-saved smaller as JPEG."""
    sources = sorted(p for p in (ROOT / "demo_archive").rglob("*.jpg"))[::7][:n]
    out = []
    for k, src in enumerate(sources):
        with Image.open(src) as im:
            im = im.convert("RGB")
            im = im.resize((max(1, im.width * 4 // 5), max(1, im.height * 4 // 5)), Image.LANCZOS)
            path = folder / f"query-{k:02d}.jpg"
            im.save(path, quality=85)
            out.append(path)
    return out


def timed(cmd: list[str]) -> float:
    start = time.perf_counter()
    out = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT)
    seconds = time.perf_counter() - start
    if out.returncode != 0:
        raise SystemExit(f"{' '.join(cmd)} failed: {out.stderr.strip()}")
    return seconds


def copy_of(db: Path, where: Path, name: str, engine: str | None = None) -> Path:
    """A copy of the database folder (each server starts from the same state); with engine="torch",
    queries described by torch."""
    copy = where / name
    shutil.copytree(db, copy, ignore=shutil.ignore_patterns("indexer.lock"))
    if engine is not None:
        manifest = json.loads((copy / "manifest.json").read_text())
        manifest.setdefault("runtime", {})["engine"] = engine
        (copy / "manifest.json").write_text(json.dumps(manifest, indent=1))
    return copy


def command_line(db: Path, torch_db: Path, files: list[Path], runs: int) -> dict:
    times = {"id": [], "file": [], "file_torch": []}
    for k in range(runs):
        f = str(files[k % len(files)])
        steps = [("id", CLI + ["search", "--id", str(5 + k), "--db", str(db)]),
                 ("file", CLI + ["search", f, "--db", str(db)]),
                 ("file_torch", CLI + ["search", f, "--db", str(torch_db)])]
        for name, cmd in (steps if k % 2 == 0 else steps[::-1]):
            times[name].append(timed(cmd))
    return {name: statistics.median(v) for name, v in times.items()}


def baseline_explanation(db: Path) -> None:
    """One explanation, so that the archive's mean cell feature (explain-baseline.npz, computed by the
    first explanation an archive ever gets, then kept) is there for every server below."""
    subprocess.run(PY + ["-c", "from index.api import Archive; a = Archive.open(" + repr(str(db)) + "); "
                         "i = [r['id'] for r in a.items(limit=2)['items']]; a.explain(i[0], i[1])"],
                   check=True, cwd=ROOT)


# --- the page ---------------------------------------------------------------------------------
def multipart(path: Path) -> tuple[bytes, str]:
    boundary = uuid.uuid4().hex
    body = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; filename=\"{path.name}\"\r\n"
            "Content-Type: image/jpeg\r\n\r\n").encode() + path.read_bytes() + f"\r\n--{boundary}--\r\n".encode()
    return body, f"multipart/form-data; boundary={boundary}"


def call(base: str, path: str, data: bytes | None = None, content_type: str | None = None) -> dict:
    request = urllib.request.Request(base + path, data=data, method="POST" if data else "GET")
    if content_type:
        request.add_header("Content-Type", content_type)
    with urllib.request.urlopen(request, timeout=300) as r:
        return json.loads(r.read())


def page_query(base: str, path: Path) -> tuple[float, str, int]:
    """Upload + search as the page sends them; seconds, the upload token and the best match's id."""
    start = time.perf_counter()
    body, kind = multipart(path)
    token = call(base, "/api/queries", body, kind)["upload"]
    found = call(base, "/api/search?" + urllib.parse.urlencode({"upload": token, "k": 24}))
    return time.perf_counter() - start, token, found["results"][0]["id"]


def start_server(cmd: list[str]) -> tuple[subprocess.Popen, list[str], float]:
    """The server process, its output lines, and the seconds until its ready line."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, cwd=ROOT)
    lines: list[str] = []
    ready = threading.Event()

    def read():
        for line in proc.stdout:
            lines.append(line.rstrip())
            if "is serving" in line:
                ready.set()

    threading.Thread(target=read, daemon=True).start()
    if not ready.wait(300):
        proc.kill()
        raise SystemExit("the server did not say it was ready:\n" + "\n".join(lines))
    return proc, lines, time.perf_counter() - start


def server_command(kind: str, db: Path, port: int) -> list[str]:
    if kind == "default":
        return CLI + ["serve", "--db", str(db), "--port", str(port)]
    if kind == "no-background":  # the same server without the thread that loads torch for explanations
        return PY + ["-c", "from web.serve import serve; "
                     f"serve({str(db)!r}, '127.0.0.1', {port}, None, warm_explanations=False, announce=lambda r: "
                     "print(f'kinscope is serving (query model ready in {r[\"seconds\"]:.1f} s, {r[\"engine\"]})',"
                     " flush=True))"]
    # "before": the server as it was, nothing warmed, ready as soon as it listens (queries by torch)
    return PY + ["-c", "from waitress import create_server; from web import create_app; "
                 f"app = create_app({{'KINSCOPE_DB': {str(db)!r}, 'KINSCOPE_PORT': {port}}}); "
                 f"server = create_server(app, host='127.0.0.1', port={port}, threads=4); "
                 "print('kinscope is serving (nothing warmed)', flush=True); server.run()"]


def server_run(db: Path, files: list[Path], n: int, kind: str, explain_after: float) -> dict:
    from web.serve import free_port

    port = free_port()
    cmd = server_command(kind, db, port)
    proc, lines, startup = start_server(cmd)
    base = f"http://127.0.0.1:{port}"
    ready_at = time.perf_counter()
    try:
        first, token, match = page_query(base, files[0])
        later = [page_query(base, f)[0] for f in files[1:n + 1]]
        time.sleep(max(0.0, explain_after - (time.perf_counter() - ready_at)))  # a user looks at the results
        since_ready = time.perf_counter() - ready_at
        explained = []
        for _ in range(2):
            t = time.perf_counter()
            call(base, "/api/explain?" + urllib.parse.urlencode({"upload": token, "match": match}))
            explained.append(time.perf_counter() - t)
    finally:
        proc.terminate()
        proc.wait(timeout=30)
    return {"startup": startup, "line": lines[0], "first": first, "later": statistics.median(later),
            "explain_at": since_ready, "explain_first": explained[0], "explain_next": explained[1]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--db", type=Path, help="an indexed archive with its ONNX model cached (default: index "
                    "demo_archive into a temporary folder)")
    ap.add_argument("--runs", type=int, default=7, help="runs of each command")
    ap.add_argument("--queries", type=int, default=8, help="page queries after the first")
    ap.add_argument("--explain-after", type=float, default=8.0,
                    help="seconds after the ready line before the first explanation is asked")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="kinscope-bench-query-") as tmp:
        tmp = Path(tmp)
        db = args.db
        if db is None:
            db = tmp / "db"
            print("indexing demo_archive ...", flush=True)
            subprocess.run(CLI + ["index", str(ROOT / "demo_archive"), "--db", str(db)], check=True,
                           capture_output=True, cwd=ROOT)
        (tmp / "q").mkdir()
        files = queries(tmp / "q", max(args.runs, args.queries + 1))
        db = copy_of(db, tmp, "db-bench")  # the explanations' baseline is written into it below
        tdb = copy_of(db, tmp, "db-torch", engine="torch")
        print(f"archive {db}; load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
        cli = command_line(db, tdb, files, args.runs)
        print(f"\ncommand line, median of {args.runs} fresh processes each:")
        print(f"  {'search --id N':<34} {cli['id']:6.2f} s")
        print(f"  {'search FILE (cached ONNX model)':<34} {cli['file']:6.2f} s   {cli['file'] / cli['id']:5.2f} x by id")
        print(f"  {'search FILE (torch, as before)':<34} {cli['file_torch']:6.2f} s   "
              f"{cli['file_torch'] / cli['id']:5.2f} x by id")
        baseline_explanation(db)
        print(f"\nthe page: upload + search of a file; {args.queries} later queries (median); then two explanations")
        print(f"  {'server':<38} {'ready':>6} {'first':>7} {'later':>7} {'first/later':>11} "
              f"{'expl. 1':>8} {'expl. 2':>8}")
        for n, (label, engine, kind) in enumerate((("default (torch warmed in background)", None, "default"),
                                                   ("no background warm", None, "no-background"),
                                                   ("before: torch queries, nothing warmed", "torch", "before"))):
            r = server_run(copy_of(db, tmp, f"db-server-{n}", engine), files, args.queries, kind,
                           args.explain_after)
            print(f"  {label:<38} {r['startup']:5.1f}s {r['first']:6.3f}s {r['later']:6.3f}s "
                  f"{r['first'] / r['later']:10.1f}x {r['explain_first']:7.2f}s {r['explain_next']:7.2f}s")
            print(f"      first line: {r['line'][-60:]}; explanations asked {r['explain_at']:.1f} s after ready")
        print(f"\nload average after: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
