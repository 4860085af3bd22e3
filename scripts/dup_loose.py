#!/usr/bin/env python3
"""Measure grouping rules of the duplicate job on the benchmark's cached archives, without re-indexing.

For every setting of scripts/bench_duplicates.py (one family at a time, 5 / 10 / 19 versions, and each with the
large distractors when the workdir has them), the candidate pairs are scored once at a low threshold with the
colour check (the screened background and the check do not depend on the threshold), kept in an .npz beside the
workdir, and each rule is then applied to the same pairs: precision and recall over standard pairs per setting.

    .venv/bin/python scripts/dup_loose.py --workdir /tmp/kdup --cache /tmp/kdup-edges [--large 12000]

The workdir must hold a set and archive made by bench_duplicates.py (with --large N for the large settings).
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from index.api import Archive  # noqa: E402
from index.duplicates import colour as dup_colour  # noqa: E402
from index.duplicates import groups as dup  # noqa: E402
import dup_settings  # noqa: E402
from bench_duplicates import Indexed, family_subsets  # noqa: E402

LOW = 0.10  # pairs are scored once down to this normalised score


def settings_of(work: Path, large: int) -> dict:
    labels = json.loads((work / "set" / "labels.json").read_text())
    archive = Archive.open(work / "db")
    ix = Indexed(archive, labels, work / "phash.npy")
    out = {"families": (ix, family_subsets(ix.labels))}
    out.update({f"{c}v": (ix, [dup_settings.versions(ix.labels, c)]) for c in dup_settings.VERSION_COUNTS})
    if large:
        big = Archive.open(work / "db-large")
        extra = sorted(str(p.resolve()) for p in (work / "extra").rglob("*.jpg"))  # as catalogued
        bx = Indexed(big, labels + [{"path": p, "source": None, "family": None, "variant": None} for p in extra],
                     work / f"phash-large-{large}.npy")
        extra_pos = np.arange(len(ix.labels), len(bx.labels))
        for name in list(out):
            out[name + "+L"] = (bx, [np.concatenate([sel, extra_pos]) for sel in out[name][1]])
    return out


def edges(settings: dict, cache: Path, layer: str = "objects") -> dict:
    """{setting: [(sel, labels, vectors, (a, b, s))]} with pairs scored down to LOW, cached per setting."""
    cache.mkdir(parents=True, exist_ok=True)
    checks = {}
    out = {}
    for name, (x, sels) in settings.items():
        out[name] = []
        for n, sel in enumerate(sels):
            f = cache / f"{name}-{n}.npz"
            if f.exists():
                z = np.load(f)
                abs_ = (z["a"], z["b"], z["s"])
            else:
                if id(x) not in checks:
                    checks[id(x)] = dup_colour.PairCheck([l["path"] for l in x.labels])
                c = checks[id(x)]
                a, b, s, _ = dup.near_edges(x.vectors[layer][sel], LOW, min_cosine=dup.MIN_COSINE[layer],
                                            pair_check=lambda i, j, sel=sel, c=c: c(sel[i], sel[j]))
                np.savez(f, a=a, b=b, s=s)
                abs_ = (a, b, s)
                print(f"scored {name} #{n}: {len(a)} pairs >= {LOW}", flush=True)
            out[name].append((sel, x.labels, abs_))
    return out


def evaluate(runs: dict, rule) -> dict:
    """{setting: (precision, recall std)} of `rule(n, a, b, s) -> [(centre, members)]`."""
    res = {}
    for name, items in runs.items():
        total = np.zeros(6, int)
        for sel, labels, (a, b, s) in items:
            groups = [set(sel[m].tolist()) for _, m in rule(len(sel), a, b, s)]
            total += dup_settings.counts(groups, labels, sel)
        p, r, _ = dup_settings.ratios(total)
        res[name] = (p, r)
    return res


def show(label: str, res: dict) -> None:
    worst_p = min(p for p, _ in res.values())
    worst_r = min(r for _, r in res.values())
    print(f"{label:<38} | " + " | ".join(f"{p:.3f} {r:.3f}" for p, r in res.values())
          + f" || minP {worst_p:.3f} minR {worst_r:.3f}", flush=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--workdir", type=Path, required=True)
    ap.add_argument("--cache", type=Path, required=True)
    ap.add_argument("--large", type=int, default=0)
    ap.add_argument("--threshold", type=float, default=dup.DEFAULT_THRESHOLD)
    args = ap.parse_args()
    runs = edges(settings_of(args.workdir, args.large), args.cache)
    t = args.threshold
    print(f"{'rule':<38} | " + " | ".join(f"{n[:11]:>11}" for n in runs))

    def strict(n, a, b, s):
        k = s >= t
        return dup.near_groups(n, a[k], b[k], s[k])

    show(f"no band, T={t}", evaluate(runs, strict))
    for rule_label, rule in candidate_rules(t):
        show(rule_label, evaluate(runs, rule))


def candidate_rules(t: float):
    """The loose-band rules measured (docs/duplicates.md, Loose band): (label, rule)."""
    for loose in (0.20, 0.18, 0.16, 0.14, 0.12, 0.10):
        for k in (2, 3, 4):
            for share, rounds in ((0.0, 1), (0.25, 1), (0.5, 1), (0.0, 3)):
                yield (f"band {loose:.2f} k{k} share {share:.2f} rounds {rounds}",
                       lambda n, a, b, s, loose=loose, k=k, share=share, rounds=rounds: dup.near_groups(
                           n, a, b, s, threshold=t, loose=loose, loose_links=k, loose_share=share, rounds=rounds))

if __name__ == "__main__":
    main()
