#!/usr/bin/env python3
"""Colourways on the demo archive: the near groups at the default, colour check of near pairs off and on
(and, with it on, the grouping's loose band off).

The demo archive (demo_archive/, our invented textile studio) holds about twenty colourways of each of
eleven motifs; its answer key (demo_archive/key.csv) names each file's motif and colourway, and the source of
each re-scan and byte copy. Two colourways of one motif are two designs, not copies. Printed per setting: near
groups, groups that mix designs (more than one motif + colourway), re-scans grouped with their source, and
what the colour check read and refused.

    .venv/bin/python scripts/demo_colourways.py --db /tmp/kdemo      # indexes the demo the first time (~1 min)
"""
from __future__ import annotations

import argparse
import csv
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from index.api import Archive  # noqa: E402

DEMO = Path(__file__).resolve().parents[1] / "demo_archive"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--db", type=Path, required=True, help="Archive of the demo (indexed here when missing).")
    ap.add_argument("--threshold", type=float, help="Default: the calibrated threshold.")
    args = ap.parse_args()
    with open(DEMO / "key.csv", newline="") as fh:
        key = {str(DEMO / r["path"]): r for r in csv.DictReader(fh)}
    archive = Archive.open(args.db, create=True, layers=["objects"])
    if not list(archive.catalog.db.query("select id from images limit 1")):
        archive.add([DEMO], progress=sys.stderr.isatty())
    for colour, loose in ((False, True), (True, True), (True, False)):
        doc = archive.duplicates(threshold=args.threshold, colour_check=colour, loose_band=loose)
        print(f"colour check {'on ' if colour else 'off'}, loose band {'on ' if loose else 'off'}: "
              + summary(doc, key))
    archive.close()


def summary(doc: dict, key: dict) -> str:
    design = {p: (r["motif"], r["colourway"]) for p, r in key.items() if r["motif"]}
    near = [g for g in doc["groups"] if g["kind"] == "near"]
    mixed = sum(len({design[m["path"]] for m in g["members"] if m["path"] in design}) > 1 for g in near)
    together = 0
    rescans = [(p, str(DEMO / r["source"])) for p, r in key.items() if r["kind"] == "rescan"]
    for scan, source in rescans:
        together += any({scan, source} <= {m["path"] for m in g["members"]} for g in near)
    c = doc["counts"]
    return (f"threshold {doc['threshold']:g}: {len(near)} near groups, {mixed} mixing designs; re-scans grouped "
            f"with their source {together}/{len(rescans)}; colour check read {c.get('colour_read', 0)} files, "
            f"refused {c.get('colour_vetoed', 0)} pairs")


if __name__ == "__main__":
    main()
