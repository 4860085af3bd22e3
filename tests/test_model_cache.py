"""One export per model, in a per-user cache: a second archive with the same settings imports no torch."""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from index.model import model_cache

REPO = Path(__file__).resolve().parents[1]

# Runs in a fresh process: creates an archive and indexes a folder on the ONNX engine; lists the child
# processes started through subprocess.run (the ones that load torch). With `forbid`, any is an error.
SCRIPT = """
import json, subprocess, sys
db, folder, forbid = sys.argv[1], sys.argv[2], sys.argv[3] == "1"
children, run = [], subprocess.run
def watch(*args, **kwargs):
    if forbid:
        raise AssertionError(f"a child process was started: {args[0]}")
    children.append(args[0][-1])
    return run(*args, **kwargs)
subprocess.run = watch
from index.api import Archive
archive = Archive.open(db, create=True, layers=["texture", "objects"])
report = archive.add([folder], progress=False, engine="onnx")
top = archive.search(folder + "/coffee.png", layer="objects", k=1)["results"][0]
print(json.dumps({"torch": "torch" in sys.modules, "engine": report["engine"], "embedded": report["embedded"],
                  "top": top["path"].rsplit("/", 1)[-1], "score": top["score"], "children": children}))
"""


def _run(db: Path, folder: Path, cache: Path, forbid: bool) -> dict:
    env = {**os.environ, model_cache.ENV: str(cache)}
    out = subprocess.run([sys.executable, "-c", SCRIPT, str(db), str(folder), "1" if forbid else "0"],
                         capture_output=True, text=True, cwd=REPO, env=env)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_a_second_archive_uses_the_cached_model_and_settings_without_torch(tmp_path, sample_images):
    folder = tmp_path / "imgs"
    folder.mkdir()
    for name in ("astronaut", "coffee", "chelsea"):  # scikit-image's sample photographs
        sample_images[name].save(folder / f"{name}.png")
    cache = tmp_path / "cache"
    # The first archive resolves its layers and exports the model in one child process (torch loaded once).
    first = _run(tmp_path / "db1", folder, cache, forbid=False)
    assert first == {"torch": False, "engine": "onnx", "embedded": 3, "top": "coffee.png",
                     "score": pytest.approx(1.0, abs=1e-4), "children": ["--new-manifest"]}
    models = list((cache / "models").glob("*.onnx"))
    assert len(models) == 1 and not (tmp_path / "db1" / "engines").exists()
    assert len(list((cache / "settings").glob("*.json"))) == 1
    stamp = models[0].stat().st_mtime_ns
    # A new archive with the same settings: no child process (so no torch anywhere), the same model file.
    second = _run(tmp_path / "db2", folder, cache, forbid=True)
    assert second == {**first, "children": []}
    assert list((cache / "models").glob("*.onnx")) == models and models[0].stat().st_mtime_ns == stamp
    m1, m2 = (json.loads((tmp_path / d / "manifest.json").read_text()) for d in ("db1", "db2"))
    assert m1["backbone"] == m2["backbone"] and m1["layers"] == m2["layers"]
    assert m2["versions"]["torch"] != "not installed"
    # The same check fails when the cache is gone: resolving the layers needs a child process again.
    with pytest.raises(AssertionError, match="child process was started"):
        _run(tmp_path / "db3", folder, tmp_path / "empty-cache", forbid=True)


def test_a_settings_record_is_ignored_once_the_weights_file_changes(tmp_path, monkeypatch):
    from index.model import settings_cache

    monkeypatch.setenv(model_cache.ENV, str(tmp_path / "cache"))
    weights = tmp_path / "w.pth"
    weights.write_bytes(b"first weights")
    from index.common.files import sha256_file

    resolved = {"backbone": {"name": "efficientnet_lite0", "weights_file": str(weights),
                             "weights_sha256": sha256_file(weights)},
                "layers": [{"name": "parts", "node": "blocks.11.expand.act", "channels": 672, "stride": 16}],
                "default_search_layer": "parts"}
    settings_cache.remember("efficientnet_lite0", weights, ["parts"], resolved)
    assert settings_cache.recall("efficientnet_lite0", weights, ["parts"]) == resolved
    assert settings_cache.recall("efficientnet_lite0", weights, ["objects"]) is None  # other layers: another key
    weights.write_bytes(b"other weights")
    assert settings_cache.recall("efficientnet_lite0", weights, ["parts"]) is None


def test_the_cache_folder_follows_the_environment(monkeypatch, tmp_path):
    # XDG Base Directory Specification: $XDG_CACHE_HOME, when set to an absolute path, else ~/.cache.
    monkeypatch.delenv(model_cache.ENV, raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert model_cache.user_cache_dir() == tmp_path / "xdg" / "kinscope"
    monkeypatch.setenv("XDG_CACHE_HOME", "relative/path")  # the spec says to ignore a relative one
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert model_cache.user_cache_dir() == tmp_path / "home" / ".cache" / "kinscope"
    monkeypatch.setenv(model_cache.ENV, str(tmp_path / "mine"))
    assert model_cache.user_cache_dir() == tmp_path / "mine"


def test_a_first_archive_for_the_torch_engine_exports_nothing(tmp_path):
    """Archive.open(engine="torch") resolves the layers in the child process without the ONNX export."""
    cache = tmp_path / "cache"
    script = ("import sys\nfrom index.api import Archive\n"
              "Archive.open(sys.argv[1], create=True, layers=['objects'], engine='torch').close()\n"
              "print('torch' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", script, str(tmp_path / "db")], capture_output=True, text=True,
                         cwd=REPO, env={**os.environ, model_cache.ENV: str(cache)})
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["False"]  # resolved in the child
    assert len(list((cache / "settings").glob("*.json"))) == 1 and not list(cache.rglob("*.onnx"))


def test_without_a_writable_cache_nothing_is_exported_before_the_manifest(tmp_path):
    """When the per-user cache cannot be written, the model would go into the database folder; the child then leaves
    it to the indexer (after the manifest), so a failed creation never leaves a folder a second attempt refuses."""
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the cache folder should be")
    script = ("import sys\nfrom index.api import Archive\n"
              "Archive.open(sys.argv[1], create=True, layers=['objects']).close()")
    db = tmp_path / "db"
    out = subprocess.run([sys.executable, "-c", script, str(db)], capture_output=True, text=True,
                         cwd=REPO, env={**os.environ, model_cache.ENV: str(blocker / "cache")})
    assert out.returncode == 0, out.stderr
    assert (db / "manifest.json").is_file() and not list(db.rglob("*.onnx"))
