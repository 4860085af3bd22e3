"""`kinscope serve` as the browser tests run it: a subprocess on a free 127.0.0.1 port, waited for until
/api/info answers, stopped at the end (one place for what three browser test files did alike)."""
from __future__ import annotations

import contextlib
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


@contextlib.contextmanager
def serving(db: Path, log_path: Path):
    """Yield the server's base URL; its output goes to log_path (shown if it exits before answering)."""
    with serving_process(db, log_path) as (base, _):
        yield base


@contextlib.contextmanager
def serving_process(db: Path, log_path: Path, *options: str):
    """As `serving`, with more `kinscope serve` options; yields (base URL, the server's process)."""
    from web.serve import free_port

    port = free_port("127.0.0.1")
    log = open(log_path, "w")
    proc = subprocess.Popen([sys.executable, "-m", "index", "serve", "--db", str(db), "--host", "127.0.0.1",
                             "--port", str(port), *options], stdout=log, stderr=subprocess.STDOUT, cwd=REPO)
    base = f"http://127.0.0.1:{port}"
    try:
        for _ in range(600):  # the server opens the archive and warms its query model first
            if proc.poll() is not None:
                raise RuntimeError(f"kinscope serve exited: {Path(log_path).read_text()}")
            try:
                with urllib.request.urlopen(base + "/api/info", timeout=2) as r:
                    if r.status == 200:
                        break
            except (urllib.error.URLError, ConnectionError, OSError):
                time.sleep(0.2)
        else:
            raise RuntimeError("kinscope serve did not answer")
        yield base, proc
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
        log.close()
