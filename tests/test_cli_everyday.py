"""What a newcomer meets in the terminal: a busy port, progress in a log file, an empty folder, --folder."""
from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

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


@pytest.fixture(scope="module")
def first_run(tmp_path_factory):
    """`kinscope index` into a new database with its output going to pipes, as in `scripts/demo > log 2>&1`."""
    root = tmp_path_factory.mktemp("first_run")
    rng = np.random.default_rng(0)
    for i in range(6):
        folder = root / "imgs" / ("2024-spring" if i < 3 else "2024-autumn")
        folder.mkdir(parents=True, exist_ok=True)
        Image.fromarray(rng.integers(0, 255, (64, 72, 3), dtype=np.uint8)).save(folder / f"{i}.png")
    out = _kinscope("index", root / "imgs", "--db", root / "db", "--layers", "colour,parts", timeout=300)
    assert out.returncode == 0, out
    return root, out


def test_progress_in_a_log_is_plain_lines(first_run):
    root, out = first_run
    assert "\r" not in out.stdout + out.stderr
    lines = out.stderr.splitlines()
    assert any(line.startswith("indexing: 6/6 img (100%)") for line in lines), out.stderr


def test_duplicate_search_progress_off_a_terminal_is_plain_lines(capsys):
    """The duplicate job's two bars (background similarity, near-duplicate search) on a captured stderr."""
    from index.duplicates.background import background
    from index.duplicates.candidates import candidate_pairs

    x = np.random.default_rng(0).normal(size=(300, 64)).astype(np.float32)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    background(x, progress=True)
    candidate_pairs(x, 0.9, progress=True)
    err = capsys.readouterr().err
    assert "\r" not in err
    assert "background similarity: 300/300 item (100%)" in err and "near-duplicate search: 300/300" in err


def test_a_first_run_says_it_prepares_the_network_and_gives_both_rates(first_run):
    _, out = first_run
    first = out.stderr.splitlines()[0]
    assert "preparing the network (once per model)" in first
    rates = next(line for line in out.stdout.splitlines() if "images/s" in line)
    assert "while embedding" in rates and "for the whole command" in rates
    loop, whole = (float(part.split(" images/s")[0].split()[-1]) for part in rates.split(";"))
    assert 0 < whole <= loop  # the whole command includes the loop


@pytest.mark.parametrize("content", [{}, {"notes.txt": b"not an image"}])
def test_index_with_no_image_files_says_so_and_creates_nothing(tmp_path, content):
    (tmp_path / "folder").mkdir()
    for name, data in content.items():
        (tmp_path / "folder" / name).write_bytes(data)
    out = _kinscope("index", tmp_path / "folder", "--db", tmp_path / "db")
    assert out.returncode == 2 and "no image files found" in out.stderr and "Traceback" not in out.stderr
    assert not (tmp_path / "db").exists()
    out = _kinscope("index", tmp_path / "gone", "--db", tmp_path / "db")
    assert out.returncode == 2 and "no such file or folder" in out.stderr and not (tmp_path / "db").exists()


def test_index_into_an_existing_database_says_when_a_folder_holds_no_image(first_run, tmp_path):
    """An existing database is kept (the run may have removed rows); the run says it found nothing."""
    from click.testing import CliRunner

    from index.cli import main

    root, _ = first_run
    (tmp_path / "notes").mkdir()
    (tmp_path / "notes" / "notes.txt").write_text("not an image")
    out = CliRunner().invoke(main, ["index", str(tmp_path / "notes"), "--db", str(root / "db"), "-q"])
    assert out.exit_code == 0 and "no image files found below" in out.output, out.output


def test_search_folder_takes_the_names_the_page_lists(first_run, tmp_path, monkeypatch):
    """`--folder 2024-spring`, run from anywhere, keeps what the page's folder filter keeps (it sends the
    absolute folder from /api/folders and shows it below the archive's top folder)."""
    from click.testing import CliRunner

    from index.cli import main
    from web import create_app

    root, _ = first_run
    client = create_app({"KINSCOPE_DB": str(root / "db"), "TESTING": True}).test_client()
    folders = [f["folder"] for f in client.get("/api/folders").get_json()["folders"]]
    spring = next(f for f in folders if f.endswith("2024-spring"))
    autumn_item = client.get("/api/items", query_string={"folder": folders[0]}).get_json()["items"][0]["id"]
    page = client.get("/api/search", query_string={"item": autumn_item, "folder": spring, "k": 50,
                                                   "layer": "colour"}).get_json()
    expected = [r["id"] for r in page["results"]]
    assert len(expected) == 3

    monkeypatch.chdir(tmp_path)  # not the archive's folder: the name is the page's, not a path from here
    out = CliRunner().invoke(main, ["search", "--id", str(autumn_item), "--folder", "2024-spring", "--db",
                                    str(root / "db"), "--layer", "colour", "-k", "50", "--json"])
    assert out.exit_code == 0, out.output
    assert [r["id"] for r in json.loads(out.output)["results"]] == expected
    for nowhere in ("2023-winter", "/nope"):
        out = CliRunner().invoke(main, ["search", "--id", str(autumn_item), "--folder", nowhere, "--db",
                                        str(root / "db")])
        assert out.exit_code == 2 and "no indexed item lies below the folder" in out.output, out.output
        assert "Traceback" not in out.output
