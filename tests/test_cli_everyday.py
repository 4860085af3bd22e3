"""What a newcomer meets in the terminal: a busy port, progress in a log file, an empty folder, --folder."""
from __future__ import annotations

import os
import socket
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _kinscope(*args, timeout=120, cwd=None):
    """`python -m index ARGS` with stdout and stderr going to pipes (not a terminal), as in `cmd > log 2>&1`."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT)] + sys.path))
    return subprocess.run([sys.executable, "-m", "index", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, env=env, cwd=cwd)


def test_serve_on_a_busy_port_says_so_in_one_line(sample_archive):
    archive, _ = sample_archive
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        out = _kinscope("serve", "--db", archive.db, "--port", port, timeout=60)
    assert out.returncode == 2, out
    assert "Traceback" not in out.stderr and "OSError" not in out.stderr
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and f"port {port}" in lines[0] and "busy" in lines[0] and "--port" in lines[0]
    assert "is serving" not in out.stdout  # nothing claims to serve before the socket is ours


def test_server_threads_and_routine_waitress_warnings(sample_archive):
    """A page of results asks for 24 thumbnails at once: enough threads that they rarely queue, and the
    queue-depth warning that waitress logs when they do stays out of the terminal; its errors do not."""
    import logging

    from web.serve import bind

    archive, _ = sample_archive
    server = bind(str(archive.db), "127.0.0.1", 0, None)
    try:
        assert server.adj.threads >= 8
        assert not logging.getLogger("waitress.queue").isEnabledFor(logging.WARNING)
        assert logging.getLogger("waitress.queue").isEnabledFor(logging.ERROR)
        assert logging.getLogger("waitress").isEnabledFor(logging.WARNING)
    finally:
        server.close()
