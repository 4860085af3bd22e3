#!/usr/bin/env python3
"""The full crash test: SIGKILL the indexer at random moments, resume, and verify nothing was lost.

Copies demo_archive/ (or --source) into a scratch folder, runs `kinscope index` with frequent
checkpoints, kills it with SIGKILL after a random delay, again and again, then lets a last run finish
and checks: every readable image indexed exactly once, every layer's store equal to the catalog,
`kinscope check` clean. Stops by itself.

    .venv/bin/python scripts/crash_test.py --kills 20
"""
from __future__ import annotations

import argparse
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--source", default=str(ROOT / "demo_archive"))
    ap.add_argument("--kills", type=int, default=20)
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()
    rng = random.Random(args.seed)
    work = Path(tempfile.mkdtemp(prefix="kinscope-crash-"))
    files = work / "files"
    shutil.copytree(args.source, files)
    db = work / "db"
    cmd = [str(ROOT / ".venv/bin/kinscope"), "index", str(files), "--db", str(db), "-q",
           "--batch-size", "4", "--checkpoint-every", "8"]
    kills = finished_early = 0
    for _ in range(args.kills):
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(rng.uniform(1.5, 9.0))
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            kills += 1
        else:
            finished_early += 1
        proc.wait()
    final = subprocess.run(cmd, capture_output=True, text=True)
    check = subprocess.run([str(ROOT / ".venv/bin/kinscope"), "check", "--db", str(db), "--json"],
                           capture_output=True, text=True)
    report = json.loads(check.stdout)
    sys.path.insert(0, str(ROOT))
    from index.api import Archive

    archive = Archive.open(db)
    paths = [r["path"] for r in archive.catalog.db.query("select path from images")]
    ok = sorted(archive.catalog.ids_with_status("ok"))
    agree = all(sorted(archive.store(l).ids().tolist()) == ok for l in archive.layer_names)
    info = archive.info()
    print(f"{kills} SIGKILLs ({finished_early} runs finished before their kill), then a final run: exit {final.returncode}")
    print(f"images indexed {info['images']}, failed {info['failed']}, pending {info['pending']}; "
          f"duplicated paths {len(paths) - len(set(paths))}; stores agree with catalog: {agree}; "
          f"kinscope check ok: {report['ok']}")
    shutil.rmtree(work)
    sys.exit(0 if final.returncode == 0 and report["ok"] and agree and len(paths) == len(set(paths)) else 1)


if __name__ == "__main__":
    main()
