"""The command line: thin wrappers with parseable output and plain errors."""
from __future__ import annotations

import json
import subprocess
import sys

import click
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


def test_apply_with_a_report_refuses_files_of_groups_the_report_leaves_out(tmp_path, sample_images, monkeypatch):
    # The report shows at most review_page.MAX_GROUPS groups; --apply moves the files of every group. Here the
    # limit is 1 of the 3 groups (skimage.data pictures: one byte copy, two look-alike copies), so two files
    # that would move are on no page: --apply refuses unless --apply-unshown names them.
    from index.api import Archive
    from index.duplicates import review_page
    from tests.test_duplicates import make_folder, snapshot

    root = make_folder(tmp_path / "archive", sample_images, names=("astronaut", "coffee", "camera", "chelsea"))
    db = tmp_path / "db"
    with Archive.open(db, create=True, layers=["objects"]) as archive:
        archive.add([root], progress=False)
    monkeypatch.setattr(review_page, "MAX_GROUPS", 1)
    before, q, page = snapshot(root), tmp_path / "q", tmp_path / "review.html"
    runner = CliRunner()
    args = ["duplicates", "--db", str(db), "--report", str(page), "--move-to", str(q), "-q"]

    refused = runner.invoke(main, args + ["--apply"])
    assert refused.exit_code == 2 and "Traceback" not in refused.output
    assert refused.output.strip().splitlines() == [
        f"kinscope: the report {page} shows 1 of 3 groups, and 2 of the files to move are only in 2 groups it "
        "does not show; nothing was moved. Review them in the JSON or CSV output, then add --apply-unshown to "
        "move them too"]
    assert snapshot(root) == before and not q.exists()
    assert "first 1 of 3 groups" in page.read_text()  # the page says so too

    dry = runner.invoke(main, args)  # a dry run lists every file and says which ones the page leaves out
    assert dry.exit_code == 0 and "--apply will refuse them unless you add --apply-unshown" in dry.output
    alone = runner.invoke(main, ["duplicates", "--db", str(db), "--apply-unshown", "-q"])
    assert alone.exit_code == 2
    assert "--apply-unshown only goes with --report FILE and --move-to DIR --apply" in alone.output

    moved = runner.invoke(main, args + ["--apply", "--apply-unshown"])
    assert moved.exit_code == 0, moved.output
    report = json.loads(moved.stdout)["quarantine"]
    assert sum(f["status"] == "moved" for f in report["files"]) == 3
    back = runner.invoke(main, ["restore", report["manifest"], "--apply"])
    assert back.exit_code == 0 and snapshot(root) == before

    monkeypatch.setattr(review_page, "MAX_GROUPS", 500)  # every group on the page: --apply alone moves
    again = runner.invoke(main, args + ["--apply"])
    assert again.exit_code == 0, again.output
    assert sum(f["status"] == "moved" for f in json.loads(again.stdout)["quarantine"]["files"]) == 3


def test_help_is_whole_and_says_what_commands_do():
    """The command list is not cut off with "...", serve says what it does, every option has help."""
    runner = CliRunner()
    listing = runner.invoke(main, ["--help"]).output.split("Commands:")[1]
    assert listing.strip() and "..." not in listing
    for group in (["roots"],):
        assert "..." not in runner.invoke(main, [*group, "--help"]).output.split("Commands:")[1]
    serve = runner.invoke(main, ["serve", "--help"]).output
    assert "search page" in serve and "waitress" not in serve
    assert "pick another when this one is busy" in serve
    assert "Network whose layers to list" in runner.invoke(main, ["layers", "--help"]).output
    for name, command in main.commands.items():
        for param in command.params:
            if isinstance(param, click.Option) and param.name != "help":
                assert param.help, f"{name} {param.opts[0]} has no help text"


def test_duplicates_output_gives_mtime_in_iso_8601_with_the_number_beside(tmp_path):
    """1700000000.25 s after 1970 is 2023-11-14T22:13:20+00:00 (as GNU `date -u -d @1700000000.25
    --iso-8601=seconds` prints it); the number stays as mtime_epoch."""
    import csv
    import io
    import os
    import shutil

    _images(tmp_path / "imgs", 2)
    shutil.copy(tmp_path / "imgs" / "0.png", tmp_path / "imgs" / "0-copy.png")
    for name in ("0.png", "0-copy.png"):
        os.utime(tmp_path / "imgs" / name, (1_700_000_000.25, 1_700_000_000.25))
    runner = CliRunner()
    db = str(tmp_path / "db")
    assert runner.invoke(main, ["index", str(tmp_path / "imgs"), "--db", db, "-q", "--layers", "parts"]).exit_code == 0
    doc = json.loads(runner.invoke(main, ["duplicates", "--db", db, "-q"]).output)
    members = [m for g in doc["groups"] for m in g["members"]]
    assert len(members) == 2
    assert all(m["mtime"] == "2023-11-14T22:13:20+00:00" and m["mtime_epoch"] == 1_700_000_000.25 for m in members)
    rows = list(csv.DictReader(io.StringIO(runner.invoke(main, ["duplicates", "--db", db, "-q", "--format",
                                                                 "csv"]).output)))
    assert [(r["mtime"], float(r["mtime_epoch"])) for r in rows] == [("2023-11-14T22:13:20+00:00", 1_700_000_000.25)] * 2
