"""The keeper rule: which member of a duplicate group stays where it is.

The rule prefers the original over its derivatives (crops, re-scans, re-encodes, upscales, copies with
borders or changed colours), on evidence from index/duplicates/keeper_evidence.py. A member that is not on disk as
a regular file of its catalogued size, or that is reached through a symbolic link, can never be the
keeper. Each step keeps the members best on one kind of evidence (differences within its tolerance are
ties) and `choose` says which step decided. docs/duplicates.md gives the rule's measured rates
(scripts/bench_keeper.py).
"""
from __future__ import annotations

import os

import numpy as np

from .keeper_evidence import Evidence, gather

# --- tolerances: differences below these are treated as ties (measurement noise, not evidence) ---------
RESOLUTION_TOLERANCE = 0.20  # content pixel counts within 20% are equal (a rotation by 5 degrees whose
# padding went unseen enlarges the canvas by 18%)
MAGNIFIED = 1.5  # a member with 1.5 times the pixels of another (1.22 times the side) may be an upscale of it:
DETAIL_GROWTH = 0.3  # its extra pixels (ratio r) count only if its detail is at least r ** 0.3 times the other's
PADDING_TOLERANCE = 0.04  # padding fractions within 4% of the frame are equal
QUALITY_TOLERANCE = 3.0  # JPEG-equivalent qualities within 3 points are equal
SHARPNESS_TOLERANCE = 1.3  # detail per pixel within a factor 1.3 is equal
TONES_TOLERANCE = 4.0  # grey levels: distances to the group's median tones within 4 levels are equal
MTIME_TOLERANCE = 0.0  # seconds: any difference counts (a copy made by a program is newer, however little)

RULE = (
    "never a missing file, a symbolic link or a file changed since indexing; then the folders given with "
    "--prefer, in their order; then the largest effective resolution (pixels inside the picture, uniform "
    "borders and rotation padding excluded; when a member has 1.5 times the pixels of another, its extra "
    "pixels count only if its fine detail grows with them: an upscale adds pixels, not detail); then the "
    "least padding; then the lightest compression (JPEG quality read from the quantisation tables, "
    "lossless formats first); then the most detail per pixel; then colour over greyscale; then tones "
    "nearest the group's usual tones; then the oldest EXIF original date (a file without one last); then "
    "the oldest modification time; then the shortest path. Differences within a step's tolerance are ties."
)


# --- the steps ----------------------------------------------------------------------------------------------
def _out_resolves(a: Evidence, b: Evidence) -> bool:
    """a has clearly more picture than b: more content pixels beyond the tolerance, and when a has
    MAGNIFIED times b's pixels or more (it could be b enlarged), also the detail to show for them."""
    ca, cb = a.content_pixels or 0.0, b.content_pixels or 0.0
    if ca <= cb * (1 + RESOLUTION_TOLERANCE):
        return False
    return ca < cb * MAGNIFIED or _beats(a, b)


def _beats(big: Evidence, small: Evidence) -> bool:
    if big.detail is None or small.detail is None:
        return True  # no measurement: the pixels count
    return big.detail >= small.detail * (big.content_pixels / small.content_pixels) ** DETAIL_GROWTH


def _best(alive, ev, value, *, higher: bool, within) -> list[int]:
    """Members whose value is within `within(best)` of the best; unknown values are kept."""
    known = [value(ev[i]) for i in alive if value(ev[i]) is not None]
    if not known:
        return alive
    best = max(known) if higher else min(known)
    limit = within(best)
    return [i for i in alive if value(ev[i]) is None or (value(ev[i]) >= limit if higher else value(ev[i]) <= limit)]


def _n(x: float) -> str:
    return f"{x:,.0f}"


def _step_eligible(alive, ev):
    ok = [i for i in alive if ev[i].eligible]
    return ok or alive


def _step_prefer(alive, ev):
    best = min(ev[i].prefer_rank for i in alive)
    return [i for i in alive if ev[i].prefer_rank == best]


def _step_resolution(alive, ev):
    """Members no other member out-resolves (the relation follows content pixels, so someone is left)."""
    return [i for i in alive if not any(_out_resolves(ev[j], ev[i]) for j in alive if j != i)]


def _step_padding(alive, ev):
    return _best(alive, ev, lambda e: e.padding, higher=False, within=lambda b: b + PADDING_TOLERANCE)


def _step_quality(alive, ev):
    return _best(alive, ev, lambda e: e.quality, higher=True, within=lambda b: b - QUALITY_TOLERANCE)


def _step_sharpness(alive, ev):
    return _best(alive, ev, lambda e: e.sharpness, higher=True, within=lambda b: b / SHARPNESS_TOLERANCE)


def _step_tones(alive, ev):
    """Members whose tones are nearest the group's median tones: most versions (crops, re-encodes, resized
    copies, borders) keep the source's tones, so the one that was lightened, darkened or given more or
    less contrast stands out. The median is over the whole group; with fewer than three members there is
    no majority and the step decides nothing."""
    group = [e.tones for e in ev if e.tones is not None]  # the whole group votes, not only those left
    if len(group) < 3:
        return alive
    centre = np.median(group, axis=0)
    off = {i: float(np.abs(np.array(ev[i].tones) - centre).max()) for i in alive if ev[i].tones is not None}
    if not off:
        return alive
    best = min(off.values())
    return [i for i in alive if i not in off or off[i] <= best + TONES_TOLERANCE]


def _step_colour(alive, ev):
    return [i for i in alive if ev[i].colour is not False] if any(ev[i].colour for i in alive) else alive


def _step_exif(alive, ev):
    dated = [ev[i].captured_at for i in alive if ev[i].captured_at]
    return [i for i in alive if ev[i].captured_at == min(dated)] if dated else alive


def _step_mtime(alive, ev):
    times = [ev[i].mtime for i in alive if ev[i].mtime is not None]
    return [i for i in alive if ev[i].mtime is not None and ev[i].mtime <= min(times) + MTIME_TOLERANCE] \
        if times else alive


def _step_path(alive, ev):
    return [min(alive, key=lambda i: (len(ev[i].path), ev[i].path))]


def _why_eligible(k, out):
    return f"the only member that can be kept (the others: {out[0].why_not})"


def _why_prefer(k, out):
    return "in a folder given with --prefer" + (f" (choice {k.prefer_rank + 1})" if k.prefer_rank else "")


def _why_resolution(k, out):
    o = max(out, key=lambda e: e.content_pixels or 0.0)
    return f"largest effective resolution ({_n(k.content_pixels)} pixels of picture against {_n(o.content_pixels)})"


def _why_padding(k, out):
    o = min(out, key=lambda e: e.padding)
    return f"same resolution; less border or rotation padding ({k.padding:.0%} of the frame against {o.padding:.0%})"


def _why_quality(k, out):
    o = max(out, key=lambda e: e.quality)
    return f"same resolution and framing; lighter compression (quality {k.quality:.0f} against {o.quality:.0f})"


def _why_sharpness(k, out):
    o = max(out, key=lambda e: e.sharpness)
    return (f"same resolution, framing and compression; more detail per pixel ({k.sharpness / o.sharpness:.1f} "
            "times: the others look magnified or softened)")


def _why_tones(k, out):
    return ("same resolution, framing, compression and detail; tones nearest the group's usual tones (the others "
            "were lightened, darkened or given more or less contrast)")


def _why_colour(k, out):
    return "same resolution, framing and compression; in colour (the others are greyscale)"


def _why_exif(k, out):
    later = [e.captured_at for e in out if e.captured_at]
    if not later:
        return f"the only one with an EXIF original date ({k.captured_at})"
    return f"oldest EXIF original date ({k.captured_at} against {min(later)})"


def _why_mtime(k, out):
    return "equal on the picture's evidence; oldest modification time"


def _why_path(k, out):
    if any(len(e.path) == len(k.path) for e in out):
        return "equal on every other step; first path in alphabetical order"
    return "equal on every other step; shortest path"


STEPS = (("eligible", _step_eligible, _why_eligible), ("prefer", _step_prefer, _why_prefer),
         ("resolution", _step_resolution, _why_resolution), ("padding", _step_padding, _why_padding),
         ("compression", _step_quality, _why_quality), ("sharpness", _step_sharpness, _why_sharpness),
         ("colour", _step_colour, _why_colour), ("tones", _step_tones, _why_tones), ("exif", _step_exif, _why_exif),
         ("mtime", _step_mtime, _why_mtime), ("path", _step_path, _why_path))


def choose(ev: list[Evidence], *, skip: tuple[str, ...] = ()) -> tuple[int, str]:
    """(index of the keeper, why it won against the last member(s) it beat). `skip` leaves steps out
    (scripts/bench_keeper.py measures what each step adds)."""
    alive = list(range(len(ev)))
    decided = None
    for name, step, why in STEPS:
        if name in skip and name != "path":
            continue
        survivors = step(alive, ev)
        if len(survivors) < len(alive):
            decided = (why, [ev[i] for i in alive if i not in survivors])
        alive = survivors
        if len(alive) == 1:
            break
    keep = alive[0]
    reason = "only member" if decided is None else decided[0](ev[keep], decided[1])
    if not ev[keep].eligible:
        reason = f"no member can be kept ({ev[keep].why_not}); the group is left alone. Best by the rule: {reason}"
    return keep, reason


class KeeperRule:
    """The rule with its options; gathers evidence once per path during one duplicates job."""

    def __init__(self, prefer: list[str] | None = None):
        self.prefer = [os.path.abspath(p) for p in (prefer or [])]
        self._cache: dict[tuple[str, bool], Evidence] = {}

    @property
    def text(self) -> str:
        if not self.prefer:
            return RULE
        return RULE + " Preferred folders: " + ", ".join(self.prefer) + "."

    def evidence(self, rows: list[dict], *, pixels: bool) -> list[Evidence]:
        out = []
        for row in rows:
            key = (row["path"], pixels)
            if key not in self._cache:
                self._cache[key] = gather(row, prefer=self.prefer, pixels=pixels)
            out.append(self._cache[key])
        return out

    def choose(self, rows: list[dict], *, pixels: bool = True) -> tuple[int, str, list[Evidence]]:
        ev = self.evidence(rows, pixels=pixels)
        keep, reason = choose(ev)
        return keep, reason, ev
