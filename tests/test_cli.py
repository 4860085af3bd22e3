"""The command line: thin wrappers with parseable output and plain errors."""
from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
from click.testing import CliRunner
from PIL import Image

from index.cli import main


def _images(folder, n=4):
    folder.mkdir()
    rng = np.random.default_rng(0)
    for i in range(n):
        Image.fromarray(rng.integers(0, 255, (64, 72, 3), dtype=np.uint8)).save(folder / f"{i}.png")


def test_index_then_search_json_has_the_documented_keys(tmp_path):
    _images(tmp_path / "imgs")
    runner = CliRunner()
    out = runner.invoke(main, ["index", str(tmp_path / "imgs"), "--db", str(tmp_path / "db"), "-q",
                               "--layers", "colour,texture"])
    assert out.exit_code == 0, out.output
    assert "4 new" in out.output
    out = runner.invoke(main, ["search", str(tmp_path / "imgs" / "2.png"), "--db", str(tmp_path / "db"),
                               "-k", "3", "--json", "--layer", "colour"])
    assert out.exit_code == 0, out.output
    doc = json.loads(out.output)
    assert set(doc) == {"query", "layer", "results"} and doc["layer"] == "colour"
    assert len(doc["results"]) == 3
    assert all(set(r) == {"id", "path", "score", "width", "height"} for r in doc["results"])
    assert doc["results"][0]["path"].endswith("2.png") and (doc["results"][0]["width"], doc["results"][0]["height"]) == (72, 64)
    by_id = json.loads(runner.invoke(main, ["search", "--id", str(doc["results"][0]["id"]), "--db",
                                            str(tmp_path / "db"), "--json"]).output)
    assert by_id["query"]["id"] == doc["results"][0]["id"]


def test_info_and_layers_commands(tmp_path):
    _images(tmp_path / "imgs", 2)
    (tmp_path / "imgs" / "empty.png").write_bytes(b"")
    runner = CliRunner()
    runner.invoke(main, ["index", str(tmp_path / "imgs"), "--db", str(tmp_path / "db"), "-q", "--layers", "colour"])
    out = runner.invoke(main, ["info", "--db", str(tmp_path / "db")])
    assert out.exit_code == 0 and "2 indexed" in out.output and "empty.png" in out.output
    data = json.loads(runner.invoke(main, ["info", "--db", str(tmp_path / "db"), "--json"]).output)
    assert data["images"] == 2 and data["failed"] == 1 and data["backbone"]["name"] == "efficientnet_lite0"
    layers = runner.invoke(main, ["layers"])
    assert layers.exit_code == 0 and "texture" in layers.output and "stride" in layers.output


def test_errors_are_one_line_without_a_traceback(tmp_path):
    runner = CliRunner()
    out = runner.invoke(main, ["search", "--id", "1", "--db", str(tmp_path)])
    assert out.exit_code == 2
    assert "not a kinscope database" in out.output and "Traceback" not in out.output
    out = runner.invoke(main, ["search", "--db", str(tmp_path)])
    assert out.exit_code == 2 and "give an IMAGE or --id N" in out.output


def test_several_examples_unlikes_and_expansion_from_the_command_line(tmp_path):
    _images(tmp_path / "imgs", 6)
    runner = CliRunner()
    db = str(tmp_path / "db")
    assert runner.invoke(main, ["index", str(tmp_path / "imgs"), "--db", db, "-q", "--layers", "colour,texture"]
                         ).exit_code == 0
    one = json.loads(runner.invoke(main, ["search", str(tmp_path / "imgs" / "1.png"), "--db", db, "--json"]).output)
    item = one["results"][0]["id"]
    out = runner.invoke(main, ["search", str(tmp_path / "imgs" / "0.png"), str(tmp_path / "imgs" / "1.png"),
                               "--id", str(item), "--unlike", str(tmp_path / "imgs" / "5.png"), "--expand", "1",
                               "--db", db, "--json", "-k", "6"])
    assert out.exit_code == 0, out.output
    doc = json.loads(out.output)
    assert [q["id"] for q in doc["query"]["examples"]] == [None, None, item]
    assert doc["query"]["unlike"][0]["path"].endswith("5.png") and doc["query"]["expand"]["n"] == 1
    assert item not in [r["id"] for r in doc["results"]] and len(doc["results"]) == 5
    out = runner.invoke(main, ["search", "--id", str(item), "--layer", "combined", "--db", db])
    assert out.exit_code == 2 and "lacks" in out.output and "Traceback" not in out.output


def test_python_dash_m_index_runs_the_same_cli():
    out = subprocess.run([sys.executable, "-m", "index", "--help"], capture_output=True, text=True, check=True)
    assert "search" in out.stdout and "index" in out.stdout
