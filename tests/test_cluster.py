"""Indexing on a Dask cluster (a LocalCluster of 2 worker processes on loopback)."""
from __future__ import annotations

import os
import sqlite3
import threading
import time

import numpy as np
import pytest
from PIL import Image

from index.api import Archive

distributed = pytest.importorskip("distributed")


def _folder(path, n, seed=0):
    path.mkdir(parents=True)
    rng = np.random.default_rng(seed)
    for i in range(n):
        base = rng.integers(0, 255, 3)
        Image.fromarray(np.clip(base + rng.integers(0, 90, (72, 96, 3)), 0, 255).astype(np.uint8)).save(
            path / f"c-{i:03d}.png")
    (path / "broken.jpg").write_bytes(b"\xff\xd8\xff not really")
    return path


@pytest.fixture(scope="module")
def client():
    from index.ingest.cluster import connect

    c = connect(workers=2)
    yield c
    cluster = c.cluster
    c.close()
    cluster.close()


def _by_path(archive, layer):
    rows = {r["id"]: r["path"] for r in archive.catalog.db.query("select id, path from images where status = 'ok'")}
    ids = np.array(sorted(rows), np.int64)
    vectors = archive.store(layer).reconstruct(ids)
    return {rows[i]: v for i, v in zip(ids.tolist(), vectors)}


def test_cluster_run_equals_the_single_process_run(tmp_path, client):
    imgs = _folder(tmp_path / "imgs", 40)
    local = Archive.open(tmp_path / "local", create=True, layers=["colour", "objects"])
    local.add([imgs], progress=False, engine="torch")
    remote = Archive.open(tmp_path / "remote", create=True, layers=["colour", "objects"])
    report = remote.add([imgs], progress=False, cluster=client)
    assert report["embedded"] == 40 and report["failed"] == 1
    for layer in ("colour", "objects"):
        a, b = _by_path(local, layer), _by_path(remote, layer)
        assert set(a) == set(b)
        assert max(float(np.abs(a[p] - b[p]).max()) for p in a) < 1e-5  # ids aside, descriptors equal
    assert [f["path"] for f in remote.info()["failures"]] == [str(imgs / "broken.jpg")]
    assert remote.check()["ok"]


def test_a_worker_killed_mid_run_loses_nothing(tmp_path, client):
    imgs = _folder(tmp_path / "imgs", 120, seed=5)
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    finished = threading.Event()
    state = {}

    def kill_one_worker():
        # Wait until the run has committed some work, then kill a worker while it is still going.
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline and not finished.is_set():
            with sqlite3.connect(tmp_path / "db" / "catalog.sqlite") as con:
                done = con.execute("select count(*) from images where status = 'ok'").fetchone()[0]
            if done >= 16:
                break
            time.sleep(0.05)
        workers = list(client.scheduler_info()["workers"])
        if workers and not finished.is_set():
            pid = client.run(os.getpid, workers=[workers[0]])[workers[0]]
            os.kill(pid, 9)
            state["killed_during_run"] = not finished.is_set()

    killer = threading.Thread(target=kill_one_worker)
    killer.start()
    report = archive.add([imgs], progress=False, cluster=client, checkpoint_every=16)
    finished.set()
    killer.join()
    assert state.get("killed_during_run"), "no worker was killed while the run was going: the fault was not injected"
    assert report["embedded"] == 120
    rows = list(archive.catalog.db.query("select path from images"))
    assert len(rows) == len({r["path"] for r in rows}) == 120  # every image, once
    assert archive.check()["ok"]
