#!/usr/bin/env python3
"""Give the demo archive's files the modification times its generator gave them (key.csv, column `modified`).

git keeps no modification times: a clone dates every file at the moment of the clone, so the page's date
filter, the dates shown and the keeper rule's "oldest modification time" tie-break would differ from one clone
to the next. scripts/demo runs this before indexing; scripts/make_demo_archive.py writes the same times.
Only files key.csv lists (and their folders) are touched, and only their times.

    python scripts/demo_dates.py [FOLDER]      # default: demo_archive/ beside this script's folder
"""
from __future__ import annotations

import csv
import os
import sys
from datetime import datetime
from pathlib import Path

KEY_NAME = "key.csv"
DEFAULT_FOLDER = Path(__file__).resolve().parents[1] / "demo_archive"


def recorded(folder: Path) -> dict[Path, float]:
    """Each listed file -> its recorded modification time (seconds since 1970), from key.csv."""
    with (folder / KEY_NAME).open(newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    if not rows or "modified" not in rows[0]:
        raise ValueError(f"{folder / KEY_NAME} has no `modified` column: regenerate it with "
                         "scripts/make_demo_archive.py")
    return {folder / row["path"]: datetime.fromisoformat(row["modified"]).timestamp() for row in rows}


def set_dates(folder: Path) -> int:
    """Set every listed file that exists to its recorded time, and each folder to its latest file's; returns
    how many files were set."""
    done, latest = 0, {}
    for path, when in recorded(folder).items():
        if path.is_file() and not path.is_symlink():
            os.utime(path, (when, when))
            latest[path.parent] = max(latest.get(path.parent, when), when)
            done += 1
    for parent, when in latest.items():
        os.utime(parent, (when, when))
    return done


def main(argv: list[str]) -> int:
    folder = Path(argv[0]) if argv else DEFAULT_FOLDER
    try:
        n = set_dates(folder)
    except (OSError, ValueError) as exc:
        print(f"demo_dates: {exc}", file=sys.stderr)
        return 2
    print(f"set the recorded dates of {n} files in {folder}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
