"""Near-duplicate detection: exact copies by content hash, near copies by descriptor similarity.

Plain functions over numpy arrays (shapes checked), plus `from_archive`, which pulls ids, descriptors
and catalog rows out of an archive's catalog and stores. Nothing here moves or deletes image files; the keeper rule
(index/duplicates/keeper.py) examines the files of group members only. The rules (grouping, keeper,
normalisation) and the calibration are explained in docs/duplicates.md.
"""
from __future__ import annotations

import numpy as np

from . import colour as dup_colour
from . import keeper as keeper_rule
from .background import (BACKGROUND_CEILING_MADS, BACKGROUND_RANK, BACKGROUND_SAMPLE,  # noqa: F401 (re-exported)
                             LOCAL_RANK, background, normalise, screened)
from .background import RULE as NORMALISATION_RULE
from .calibration import record as calibration_record
from .calibration import CALIBRATED_FOR, DEFAULT_LAYER, DEFAULT_THRESHOLD, DEFAULT_THRESHOLDS, MIN_COSINE  # noqa: F401
from .calibration import LOOSE_FACTORS, LOOSE_LINKS
from .candidates import EXACT_SEARCH_MAX, NEIGHBOURS, candidate_pairs, projection  # noqa: F401 (re-exported)

PAIRS_MAX_MEMBERS = 64  # groups larger than this (only exact ones can be) list no pairwise scores
SECOND_LINKS = 2  # an item no centre took joins a group where it passes against this many members

KEEPER_RULE = keeper_rule.RULE
EXACT_RULE = "exact: files with the same SHA-256 content hash (byte-identical)"
NEAR_RULE = (
    "near: star groups. Items are taken as centres in order of how many neighbours score at or above the "
    "threshold (ties: higher summed score, then lower id); a centre's group is the centre plus every "
    "not-yet-grouped neighbour scoring at or above the threshold against the centre itself. Then an item "
    "no group took joins the group in which it scores at or above the threshold against at least two "
    "members. Then (normalised score on objects only) an item still in no group joins the group in which it "
    "scores at or above the loose band, half the threshold, against at least two members (the cosine floor and the "
    "colour check hold there too): a picture's versions crowd and give many weak links, a look-alike rarely "
    "does. Every member is thus linked to the centre, or to two members of its group, so no chain of single "
    "links can join unrelated images. Byte-identical copies take part once, through their exact group's keeper."
)


class DuplicatesError(ValueError):
    """A request the user must change (unknown layer, uncalibrated settings, bad threshold)."""


def loose_threshold(threshold: float, layer: str | None = DEFAULT_LAYER) -> float | None:
    """The loose band's lower edge for a normalised threshold on `layer` (None where there is none: a layer the
    band was not measured on, or a threshold <= 0)."""
    factor = LOOSE_FACTORS.get(layer)
    return float(threshold) * factor if factor is not None and threshold > 0 else None


# --- grouping --------------------------------------------------------------------------------------------
def near_edges(vectors: np.ndarray, threshold: float, *, normalised: bool = True, min_cosine: float | None = None,
               k: int = NEIGHBOURS, exact_max: int = EXACT_SEARCH_MAX, seed: int = 0, pair_check=None,
               progress: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """Pairs (i < j) that count as near duplicates, their scores, and the background (None for raw cosine).

    The neighbour search runs once at the cosine floor and also gives each item's LOCAL_RANK-th nearest
    similarity; the background (dup_background.screened) is computed from those, then each pair is scored.
    """
    x = np.ascontiguousarray(vectors, dtype=np.float32)
    floor = -1.0 if min_cosine is None else float(min_cosine)
    if not normalised:
        a, b, s, _ = candidate_pairs(x, threshold, None, min_cosine=floor, k=k, exact_max=exact_max, seed=seed,
                                     progress=progress)
        ok = pair_check(a, b) if pair_check is not None and len(a) else np.ones(len(a), bool)
        return a[ok], b[ok], s[ok], None
    a, b, _, cos, local = candidate_pairs(x, floor, None, min_cosine=floor, k=k, exact_max=exact_max, seed=seed,
                                          kth=LOCAL_RANK, progress=progress)
    bg, _ = screened(x, a, b, cos, local, seed=seed, progress=progress)
    s = normalise(cos, bg[a], bg[b])
    keep = s >= threshold
    if pair_check is not None and keep.any():
        keep[keep] = pair_check(a[keep], b[keep])
    return a[keep], b[keep], s[keep], bg


def near_groups(n: int, i: np.ndarray, j: np.ndarray, s: np.ndarray, links: int = SECOND_LINKS, *,
                threshold: float | None = None, loose: float | None = None, loose_links: int = 2,
                loose_share: float = 0.0, rounds: int = 1) -> list[tuple[int, np.ndarray]]:
    """Star groups (star_groups) on the edges at or above `threshold` (all edges when None), then every item no
    group took joins the group in which it has such an edge to at least `links` members (attach). With `loose`,
    items still ungrouped then join a group where they have edges at or above `loose` to at least
    max(loose_links, loose_share x group size) members (`rounds` passes)."""
    strict = np.ones(len(s), bool) if threshold is None else s >= threshold
    groups = star_groups(n, i[strict], j[strict], s[strict])
    if not groups or links < 1:
        return groups
    groups = attach(n, groups, i[strict], j[strict], s[strict], links)
    if loose is not None:
        band = s >= loose
        for _ in range(rounds):
            before = sum(len(m) for _, m in groups)
            groups = attach(n, groups, i[band], j[band], s[band], loose_links, loose_share)
            if sum(len(m) for _, m in groups) == before:
                break
    return groups


def attach(n: int, groups: list[tuple[int, np.ndarray]], i: np.ndarray, j: np.ndarray, s: np.ndarray,
           links: int, share: float = 0.0) -> list[tuple[int, np.ndarray]]:
    """Every item in no group joins the group in which it has edges to at least max(links, share x group size)
    members (the most such edges; ties: higher summed score, then lower group)."""
    gid = np.full(n, -1, np.int64)
    size = np.array([len(m) for _, m in groups], np.float64)
    for g, (_, members) in enumerate(groups):
        gid[members] = g
    a, b, w = np.concatenate([i, j]), np.concatenate([j, i]), np.concatenate([s, s]).astype(np.float64)
    loose = (gid[a] < 0) & (gid[b] >= 0)  # edges from an ungrouped item into a group
    a, g, w = a[loose], gid[b[loose]], w[loose]
    if len(a) == 0:
        return groups
    key = a * len(groups) + g
    uniq, inv = np.unique(key, return_inverse=True)
    count = np.bincount(inv)
    total = np.bincount(inv, weights=w)
    item, group = uniq // len(groups), uniq % len(groups)
    enough = count >= np.maximum(links, np.ceil(share * size[group] - 1e-9))
    item, group, count, total = item[enough], group[enough], count[enough], total[enough]
    order = np.lexsort((group, -total, -count, item))  # per item: most edges, then summed score, then group
    item, group = item[order], group[order]
    first = np.r_[True, item[1:] != item[:-1]] if len(item) else np.zeros(0, bool)
    extra: dict[int, list[int]] = {}
    for it, gr in zip(item[first].tolist(), group[first].tolist()):
        extra.setdefault(gr, []).append(it)
    return [(c, np.concatenate([m, np.array(extra[g], np.int64)]) if g in extra else m)
            for g, (c, m) in enumerate(groups)]


def star_groups(n: int, i: np.ndarray, j: np.ndarray, s: np.ndarray) -> list[tuple[int, np.ndarray]]:
    """Edges (i, j, score) among n items -> [(centre, members)], members including the centre.

    Centres are taken by degree (descending), then summed score, then position; a centre's group is
    itself plus its not-yet-grouped direct neighbours. Items in no edge are in no group.
    """
    assert i.shape == j.shape == s.shape, "edge arrays must have one shape"
    if len(i) == 0:
        return []
    a = np.concatenate([i, j])
    b = np.concatenate([j, i])
    w = np.concatenate([s, s]).astype(np.float64)
    order = np.lexsort((-w, a))
    a, b = a[order], b[order]
    starts = np.searchsorted(a, np.arange(n + 1))
    degree = np.diff(starts)
    strength = np.bincount(a, weights=w[order], minlength=n)
    centres = np.lexsort((np.arange(n), -strength, -degree))
    grouped = np.zeros(n, bool)
    groups = []
    for c in centres:
        if degree[c] == 0:
            break
        if grouped[c]:
            continue
        nb = b[starts[c]:starts[c + 1]]
        nb = nb[~grouped[nb]]
        if len(nb) == 0:
            continue
        members = np.concatenate([[c], nb])
        grouped[members] = True
        groups.append((int(c), members))
    return groups


def choose_keeper(rows: list[dict], *, rule: keeper_rule.KeeperRule | None = None, pixels: bool = True) -> int:
    """Index into `rows` of the item the keeper rule keeps (index/duplicates/keeper.py; reads the members' files)."""
    return (rule or keeper_rule.KeeperRule()).choose(rows, pixels=pixels)[0]


def keeper_reason(rows: list[dict], keep: int | None = None, *, rule: keeper_rule.KeeperRule | None = None,
                  pixels: bool = True) -> str:
    """Why the rule's keeper won: the step that decided, against the member(s) that step set aside.
    `keep` (optional) must be the rule's choice; it is checked."""
    chosen, reason, _ = (rule or keeper_rule.KeeperRule()).choose(rows, pixels=pixels)
    assert keep is None or keep == chosen, f"the keeper rule chooses {chosen}, not {keep}"
    return reason


def exact_groups(hashes: list[str | None]) -> list[list[int]]:
    """Positions sharing a content hash, for every hash held by two or more items (None is never a match)."""
    by_hash: dict[str, list[int]] = {}
    for pos, h in enumerate(hashes):
        if h:
            by_hash.setdefault(h, []).append(pos)
    return [p for p in by_hash.values() if len(p) > 1]


# --- the job ---------------------------------------------------------------------------------------------
def find(ids: np.ndarray, vectors: np.ndarray, rows: list[dict], *, threshold: float = DEFAULT_THRESHOLD,
         normalised: bool = True, min_cosine: float | None = None, k: int = NEIGHBOURS,
         exact_max: int = EXACT_SEARCH_MAX, progress: bool = False, layer: str | None = None,
         prefer: list[str] | None = None, colour_check: bool = True, loose_band: bool = True) -> dict:
    """Group ids by content hash and by descriptor similarity; returns the document of groups.

    ids (n,), vectors (n, d) L2-normalised, rows: n dicts with path, width, height, mtime, size, sha256
    (and captured_at). `prefer`: folders whose members the keeper rule prefers, in order. `loose_band=False`
    leaves out the last grouping step (joins through the loose band, loose_threshold).
    """
    rule = keeper_rule.KeeperRule(prefer)
    n, d = vectors.shape
    assert ids.shape == (n,), f"expected {n} ids, got shape {ids.shape}"
    assert len(rows) == n, f"expected {n} rows, got {len(rows)}"
    if not np.isfinite(threshold):
        raise DuplicatesError(f"the threshold must be a number, got {threshold!r}")
    groups: list[dict] = []

    # exact copies: one representative (the keeper) per content takes part in the near search
    exact = exact_groups([r.get("sha256") for r in rows])
    representative = np.ones(n, bool)
    exact_of: dict[int, int] = {}  # position of an exact keeper -> index of its group in `groups`
    for positions in exact:  # byte-identical: the pixels are the same, only the files' standing differs
        keep, why, ev = rule.choose([rows[p] for p in positions], pixels=False)
        keep = positions[keep]
        representative[[p for p in positions if p != keep]] = False
        exact_of[keep] = len(groups)
        groups.append(_group("exact", keep, keep, positions, ids, vectors, rows, None, why, ev))

    reps = np.flatnonzero(representative)
    bg = loose = None
    check = None
    if len(reps) >= 2:
        if colour_check:
            check = dup_colour.PairCheck([rows[p]["path"] for p in reps.tolist()], progress=progress)
        loose = loose_threshold(threshold, layer or DEFAULT_LAYER) if (loose_band and normalised) else None
        a, b, s, bg_reps = near_edges(vectors[reps], threshold if loose is None else loose, normalised=normalised,
                                      min_cosine=min_cosine, k=k, exact_max=exact_max, pair_check=check,
                                      progress=progress)
        if bg_reps is not None:
            bg = np.zeros(n, np.float32)
            bg[reps] = bg_reps
        for centre, members in near_groups(len(reps), a, b, s, threshold=threshold, loose=loose,
                                           loose_links=LOOSE_LINKS):
            positions = reps[members].tolist()
            keep, why, ev = rule.choose([rows[p] for p in positions], pixels=True)
            keep = positions[keep]
            groups.append(_group("near", keep, int(reps[centre]), positions, ids, vectors, rows, bg, why, ev))
    for g in groups:  # tie a near group to the exact groups of its members
        if g["kind"] == "near":
            for m in g["members"]:
                pos = m.pop("_pos")
                m["exact_group"] = exact_of.get(pos)  # index into `groups` until ids are given below
        else:
            for m in g["members"]:
                m.pop("_pos")
    order = sorted(range(len(groups)), key=lambda q: (groups[q]["kind"] != "exact", groups[q]["members"][0]["path"]))
    new_id = {q: rank + 1 for rank, q in enumerate(order)}
    out = []
    for q in order:
        g = groups[q]
        g["id"] = new_id[q]
        for m in g["members"]:
            if m.get("exact_group") is not None:
                m["exact_group"] = new_id[m["exact_group"]]
        out.append(g)
    in_groups = len({m["id"] for g in out for m in g["members"]})
    return {
        "layer": layer,
        "score": "normalised" if normalised else "cosine",
        "threshold": float(threshold),
        "loose_threshold": loose,
        "min_cosine": None if min_cosine is None else float(min_cosine),
        "rules": {"exact": EXACT_RULE, "near": NEAR_RULE, "keeper": rule.text,
                  "score": (NORMALISATION_RULE if normalised else "score = cosine similarity of the descriptors")
                  + (f"; a near pair must also have cosine >= {min_cosine:g}" if min_cosine is not None else ""),
                  "colour": dup_colour.RULE if colour_check else "colour check: off"},
        "counts": {"images": int(n), "groups": len(out), "exact": sum(g["kind"] == "exact" for g in out),
                   "near": sum(g["kind"] == "near" for g in out), "images_in_groups": in_groups,
                   "colour_vetoed": check.vetoed if check else 0, "colour_read": check.read if check else 0},
        "groups": out,
    }


def _group(kind, keep, centre, positions, ids, vectors, rows, bg, reason, evidence) -> dict:
    """One group's record; member scores are against the keeper, `pairs` lists every pair, and each
    member carries the keeper rule's evidence about it (`evidence`: in the order of `positions`)."""
    evidence_of = dict(zip(positions, evidence))
    keep_first = [keep] + sorted((p for p in positions if p != keep), key=lambda p: rows[p]["path"])
    v = vectors[keep_first]
    cos = np.clip(v @ v.T, -1.0, 1.0)
    if bg is not None:
        b = bg[keep_first]
        used = normalise(cos, np.repeat(b[:, None], len(b), 1), np.repeat(b[None, :], len(b), 0))
    else:
        used = cos
    members = []
    for r, p in enumerate(keep_first):
        score = 1.0 if (kind == "exact" or r == 0) else float(used[0, r])
        members.append({"id": int(ids[p]), "path": rows[p]["path"], "score": round(score, 4),
                        "cosine": round(1.0 if kind == "exact" else float(cos[0, r]), 4),
                        "width": rows[p].get("width"), "height": rows[p].get("height"),
                        "size": rows[p].get("size"), "mtime": rows[p].get("mtime"), "sha256": rows[p].get("sha256"),
                        "evidence": evidence_of[p].as_dict(), "_pos": p})
    pairs = None
    if len(keep_first) <= PAIRS_MAX_MEMBERS:
        pairs = [{"a": int(ids[keep_first[x]]), "b": int(ids[keep_first[y]]),
                  "score": 1.0 if kind == "exact" else round(float(used[x, y]), 4),
                  "cosine": 1.0 if kind == "exact" else round(float(cos[x, y]), 4)}
                 for x in range(len(keep_first)) for y in range(x + 1, len(keep_first))]
    return {"id": None, "kind": kind, "keeper": int(ids[keep]), "keeper_reason": reason, "centre": int(ids[centre]),
            "members": members, "pairs": pairs}


# --- an archive's side ------------------------------------------------------------------------------------
ROW_COLUMNS = ("id", "path", "width", "height", "mtime", "size", "sha256", "captured_at")


def all_vectors(store) -> tuple[np.ndarray, np.ndarray]:
    """(ids, vectors) of a VectorStore, read straight from its flat index when it is one."""
    import faiss

    ids = store.ids()
    try:
        inner = faiss.downcast_index(store.index.index)
        if isinstance(inner, faiss.IndexFlat) and inner.ntotal == len(ids):
            xb = faiss.rev_swig_ptr(inner.get_xb(), inner.ntotal * inner.d)
            return ids, np.array(xb, np.float32).reshape(inner.ntotal, inner.d)
    except (AttributeError, RuntimeError):
        pass
    return ids, store.reconstruct(ids)


def resolve_settings(manifest: dict, layer: str | None, threshold: float | None,
                     normalised: bool = True) -> tuple[str, float, float | None]:
    """(layer, threshold, cosine floor) to use; refuses a default where the calibration does not hold."""
    names = [l["name"] for l in manifest["layers"]]
    if layer is None:
        layer = next((name for name in (DEFAULT_LAYER, "parts") if name in names), manifest["default_layer"])
    entry = next((l for l in manifest["layers"] if layer in (l["name"], l["node"])), None)
    if entry is None:
        raise DuplicatesError(f"this archive has no layer {layer!r}; it has: {', '.join(names)}")
    layer = entry["name"]
    floor = MIN_COSINE.get(layer) if normalised else None
    if threshold is not None:
        return layer, float(threshold), floor
    if not normalised:
        raise DuplicatesError("the calibrated thresholds are for the normalised score; with raw cosine "
                              "similarity give --threshold")
    m = manifest
    why = []
    if layer not in DEFAULT_THRESHOLDS:
        why.append(f"layer {layer!r} (calibrated: {', '.join(DEFAULT_THRESHOLDS)})")
    if m["backbone"]["name"] != CALIBRATED_FOR["backbone"]:
        why.append(f"backbone {m['backbone']['name']}")
    if float(m["pooling"]["p"]) != CALIBRATED_FOR["gem_p"]:
        why.append(f"GeM p={m['pooling']['p']}")
    if layer in m["whitening"]["learned"]:
        why.append("whitened descriptors")
    if why:
        raise DuplicatesError(
            "there is no calibrated default threshold for " + ", ".join(why)
            + "; give --threshold (see docs/duplicates.md)")
    return layer, DEFAULT_THRESHOLDS[layer], floor


def from_archive(catalog, reader, *, layer: str | None = None, threshold: float | None = None,
                 normalised: bool = True, progress: bool = False, prefer: list[str] | None = None,
                 colour_check: bool = True, loose_band: bool = True) -> dict:
    """Run the job over every embedded item of an archive on one layer: its catalog, and its stores as
    `reader` (index.vectors.reader.Reader) reads them."""
    layer, chosen, floor = resolve_settings(reader.manifest, layer, threshold, normalised)
    stored_ids, vectors = all_vectors(reader.store(layer))
    rows = {r["id"]: r for r in catalog.db.query(
        f"select {', '.join(ROW_COLUMNS)} from images where status = 'ok'")}
    keep = np.array([int(i) in rows for i in stored_ids], bool)  # skip ids the catalog has not committed
    order = np.flatnonzero(keep)[np.argsort(stored_ids[keep], kind="stable")]  # catalog order: deterministic
    ids, vectors = stored_ids[order], vectors[order]
    doc = find(ids, vectors, [rows[int(i)] for i in ids], threshold=chosen, normalised=normalised,
               min_cosine=floor, progress=progress, layer=layer, prefer=prefer, colour_check=colour_check,
               loose_band=loose_band)
    doc["calibration"] = calibration_record(layer) if threshold is None else None  # None: the user chose
    doc["db"] = str(reader.db)
    return doc
