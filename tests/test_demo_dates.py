"""The demo archive's dates: recorded in key.csv by the generator, set again after a clone (git keeps none)."""
from __future__ import annotations

import csv
import os
import shutil
import subprocess
import sys
from datetime import datetime
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "demo_archive"


def _key() -> list[dict]:
    with open(DEMO / "key.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_a_clone_gets_the_recorded_dates_back(tmp_path):
    clone = tmp_path / "demo_archive"
    shutil.copytree(DEMO, clone, copy_function=shutil.copy)  # as a clone: content kept, dates of today
    rows = _key()
    recorded = {row["path"]: datetime.fromisoformat(row["modified"]) for row in rows}
    assert all(when.utcoffset() is not None for when in recorded.values())  # ISO 8601 with its offset
    assert not any(os.stat(clone / p).st_mtime == when.timestamp() for p, when in recorded.items())
    out = subprocess.run([sys.executable, str(REPO / "scripts" / "demo_dates.py"), str(clone)], capture_output=True,
                         text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert {p: os.stat(clone / p).st_mtime for p in recorded} == {p: w.timestamp() for p, w in recorded.items()}
    for row in rows:  # a season folder's swatches are dated in its year: the page's date filter agrees
        if row["kind"] == "original":
            assert recorded[row["path"]].year == int(row["path"][:4])


def test_a_key_without_dates_is_refused_in_one_line(tmp_path):
    (tmp_path / "key.csv").write_text("path,kind,source,motif,colourway,notes\na.jpg,original,,,,\n")
    out = subprocess.run([sys.executable, str(REPO / "scripts" / "demo_dates.py"), str(tmp_path)],
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 2 and "no `modified` column" in out.stderr and "Traceback" not in out.stderr
