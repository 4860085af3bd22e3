"""Queries on the cached ONNX model: no torch in a searching process, the descriptor the indexer
stored, and a server that warms its query model before it says it is ready."""
from __future__ import annotations

import json
import subprocess
import sys
import threading
import time
import urllib.request
import uuid
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]
NAMES = ("astronaut", "coffee", "chelsea", "rocket", "brick")


@pytest.fixture(scope="module")
def onnx_archive(tmp_path_factory, sample_images):
    """Five package images (scikit-image) indexed on the ONNX engine, so its model is cached."""
    from index.api import Archive

    root = tmp_path_factory.mktemp("query-onnx")
    folder = root / "imgs"
    folder.mkdir()
    for name in NAMES:
        sample_images[name].save(folder / f"{name}.png")
    archive = Archive.open(root / "db", create=True, layers=["texture", "parts"])
    report = archive.add([folder], progress=False, engine="onnx")
    assert report["engine"] == "onnx" and report["embedded"] == len(NAMES)
    archive.close()
    return root / "db", folder


def _cosine(a, b) -> float:
    return float(np.dot(a, b) / (np.linalg.norm(a) * np.linalg.norm(b)))


def test_a_search_by_file_on_a_cached_model_imports_no_torch(onnx_archive):
    """`kinscope search FILE` (the real command, run in a fresh process) answers without torch."""
    db, folder = onnx_archive
    script = (
        "import runpy, sys\n"
        f"sys.argv = ['kinscope', 'search', {str(folder / 'coffee.png')!r}, '--db', {str(db)!r}, '-k', '2', '--json']\n"
        "try:\n"
        "    runpy.run_module('index', run_name='__main__')\n"
        "except SystemExit as exc:\n"
        "    assert not exc.code, exc.code\n"
        "print('torch loaded:', 'torch' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=REPO)
    assert out.returncode == 0, out.stderr
    found = json.loads(out.stdout[:out.stdout.rindex("}") + 1])
    assert found["results"][0]["path"].endswith("coffee.png")
    assert found["results"][0]["score"] == pytest.approx(1.0, abs=1e-4)  # the very descriptor the indexer stored
    assert out.stdout.strip().endswith("torch loaded: False")


def test_a_query_on_several_layers_at_once_imports_no_torch(onnx_archive):
    """A query described on several layers in one pass (the combined choice does this) uses the cached model too;
    it ran the network through torch until it was fixed. The descriptors are those of one layer at a time."""
    db, folder = onnx_archive
    script = (
        "import sys\n"
        "from index.api import Archive\n"
        f"a = Archive.open({str(db)!r})\n"
        f"v = a.query_vectors({str(folder / 'coffee.png')!r}, ['texture', 'parts'])\n"
        "for n in ('texture', 'parts'):\n"
        f"    one = a.query_vector({str(folder / 'coffee.png')!r}, n)\n"
        "    print(n, round(float(v[n].ravel() @ one.ravel()), 4))\n"
        "print('torch loaded:', 'torch' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=REPO)
    assert out.returncode == 0, out.stderr
    lines = out.stdout.split("\n")
    assert "texture 1.0" in lines and "parts 1.0" in lines, out.stdout  # as described one layer at a time
    assert out.stdout.strip().endswith("torch loaded: False")


def test_the_onnx_query_descriptor_is_torch_s_and_the_indexed_one(onnx_archive, sample_images):
    """A query described on the cached model equals torch's description of it (the reference, cosine
    >= 0.9999) and, for an indexed file, the descriptor stored for that file."""
    from index.api import Archive

    db, folder = onnx_archive
    with Archive.open(db) as archive:
        assert archive.query_embedder.engine.name == "onnx"
        # Not in the archive: scikit-image's camera photograph, and a crop of the cat (skimage.data).
        queries = [sample_images["camera"], sample_images["chelsea"].crop((40, 20, 300, 280))]
        for layer in ("texture", "parts"):
            for image in queries:
                onnx = archive.query_vector(image, layer)
                reference = archive.embedder.embed_images([image])[layer][0]  # torch, the reference engine
                assert _cosine(onnx, reference) >= 0.9999
            stored = archive.store(layer)
            for name in NAMES:
                row = archive.search(str(folder / f"{name}.png"), layer=layer, k=1)["results"][0]
                vector = archive.query_vector(str(folder / f"{name}.png"), layer)
                assert row["path"].endswith(f"{name}.png")
                assert _cosine(vector, stored.reconstruct(np.array([row["id"]]))[0]) >= 0.9999


def test_an_archive_preferring_torch_describes_queries_with_torch(onnx_archive):
    from index.api import Archive

    db, folder = onnx_archive
    with Archive.open(db) as archive:
        archive.manifest.setdefault("runtime", {})["engine"] = "torch"
        assert archive.query_embedder is archive.embedder and archive.query_embedder.engine.name == "torch"
        top = archive.search(str(folder / "brick.png"), layer="parts", k=1)["results"][0]
        assert top["path"].endswith("brick.png") and top["score"] == pytest.approx(1.0, abs=1e-4)


def test_a_search_without_a_cached_model_uses_torch(tmp_path, sample_images):
    from index.api import Archive

    folder = tmp_path / "imgs"
    folder.mkdir()
    sample_images["coffee"].save(folder / "coffee.png")
    with Archive.open(tmp_path / "db", create=True, layers=["colour"]) as archive:
        archive.add([folder], progress=False, engine="torch")
        assert archive.warm()["engine"] == "torch"
        assert archive.search(str(folder / "coffee.png"), k=1)["results"][0]["path"].endswith("coffee.png")


def _upload(base: str, path: Path) -> dict:
    boundary = uuid.uuid4().hex
    body = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; filename=\"q.png\"\r\n"
            "Content-Type: image/png\r\n\r\n").encode() + path.read_bytes() + f"\r\n--{boundary}--\r\n".encode()
    request = urllib.request.Request(base + "/api/search?k=2", data=body,
                                     headers={"Content-Type": f"multipart/form-data; boundary={boundary}"})
    with urllib.request.urlopen(request, timeout=120) as r:
        return json.loads(r.read())


def test_the_server_warms_its_query_model_and_says_so(onnx_archive):
    """`kinscope serve` on loopback: its first line says the query model is ready (ONNX), and a search
    by upload then finds the file itself."""
    from web.serve import free_port

    db, folder = onnx_archive
    port = free_port("127.0.0.1")
    proc = subprocess.Popen([sys.executable, "-m", "index", "serve", "--db", str(db), "--port", str(port)],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, cwd=REPO)
    lines: list[str] = []
    reader = threading.Thread(target=lambda: lines.extend(proc.stdout), daemon=True)
    reader.start()
    try:
        deadline = time.monotonic() + 120
        while not lines and time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.1)
        assert lines, "kinscope serve printed nothing"
        assert "is serving" in lines[0] and "query model ready in" in lines[0] and "onnx" in lines[0], lines[0]
        found = _upload(f"http://127.0.0.1:{port}", folder / "rocket.png")  # listening once it says so
        assert found["results"][0]["path"].endswith("rocket.png")
        assert found["results"][0]["score"] == pytest.approx(1.0, abs=1e-4)
    finally:
        proc.terminate()
        proc.wait(timeout=30)


def test_an_explanation_asked_while_torch_is_warming_is_answered(onnx_archive):
    """The server loads torch for explanations in a thread of its own; an explanation asked meanwhile
    waits for it instead of building a second extractor on the same model (which failed: torch.fx
    traced the shared model twice at once)."""
    from web import create_app

    db, _ = onnx_archive
    app = create_app({"KINSCOPE_DB": str(db)})
    holder = app.extensions["kinscope"]
    assert holder.warm()["engine"] == "onnx"
    thread = holder.warm_explanations_later()
    client = app.test_client()
    ids = [r["id"] for r in client.get("/api/items").get_json()["items"]]
    answer = client.get(f"/api/explain?item={ids[0]}&match={ids[1]}")
    assert answer.status_code == 200, answer.get_data(as_text=True)
    assert answer.get_json()["channels"]
    thread.join(timeout=120)
    assert not thread.is_alive()


def test_a_server_whose_model_cannot_load_still_starts_and_says_why(onnx_archive, monkeypatch):
    from index.api import ArchiveError
    from web import create_app

    db, _ = onnx_archive
    holder = create_app({"KINSCOPE_DB": str(db)}).extensions["kinscope"]

    def refuse(*args, **kwargs):
        raise ArchiveError("the weights of efficientnet_lite0 differ from the ones this archive was built with")

    monkeypatch.setattr(holder.archive, "warm", refuse)
    ready = holder.warm()
    assert "engine" not in ready and ready["error"].startswith("the weights of")
