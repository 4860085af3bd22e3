"""Near-duplicate detection: exact copies by content hash, near copies by descriptor similarity.

Plain functions over numpy arrays (shapes checked), plus `from_archive`, which pulls ids, descriptors
and catalog rows out of an Archive. Nothing here moves or deletes image files; the keeper rule
(index/keeper.py) examines the files of group members only. The rules (grouping, keeper,
normalisation) and the calibration are explained in docs/duplicates.md.
"""
from __future__ import annotations

import os

import numpy as np

from . import keeper as keeper_rule

# --- calibrated defaults: measured with scripts/bench_duplicates.py, table in docs/duplicates.md -----------
DEFAULT_LAYER = "objects"
# Normalised score (see `normalise`) at which two items count as near duplicates, per preset layer.
DEFAULT_THRESHOLDS = {"objects": 0.25, "parts": 0.06}
DEFAULT_THRESHOLD = DEFAULT_THRESHOLDS[DEFAULT_LAYER]
# Raw cosine a pair must also reach with the normalised score: in a small archive the background is
# estimated from few items and runs low; this floor cost no recall on the benchmark's standard families.
MIN_COSINE = {"objects": 0.75, "parts": 0.95}
# The settings the calibration holds for; for others the user must give a threshold.
CALIBRATED_FOR = {"backbone": "efficientnet_lite0", "gem_p": 3.0, "whitened": False}

# --- search parameters ------------------------------------------------------------------------------------
NEIGHBOURS = 32  # candidate neighbours per item; a group holds at most NEIGHBOURS + 1 items
BACKGROUND_SAMPLE = 500  # random reference sample measuring each item's background (about the benchmark's size)
BACKGROUND_RANK = 10  # background = similarity to the item's BACKGROUND_RANK-th neighbour in that sample ...
BACKGROUND_CEILING_MADS = 5.0  # ... but at most median + 5 MAD of its similarities to the sample
EXACT_SEARCH_MAX = 5_000  # up to this many items: exact inner-product search; above: IVF (approximate)
IVF_TRAIN_PER_LIST = 40  # k-means training points per inverted list (2 sqrt(n) lists)
IVF_NPROBE = 8  # inverted lists visited per query
PCA_DIM = 64  # above EXACT_SEARCH_MAX the candidate search runs on a PCA projection; final scores are exact
PCA_SAMPLE = 10_000  # rows the projection is learned from
PAIRS_MAX_MEMBERS = 64  # groups larger than this (only exact ones can be) list no pairwise scores
CHUNK = 4096  # queries per search call (progress granularity and memory bound)

KEEPER_RULE = keeper_rule.RULE
EXACT_RULE = "exact: files with the same SHA-256 content hash (byte-identical)"
NEAR_RULE = (
    "near: star groups. Items are taken as centres in order of how many neighbours score at or above the "
    "threshold (ties: higher summed score, then lower id); a centre's group is the centre plus every "
    "not-yet-grouped neighbour scoring at or above the threshold against the centre itself. Every member "
    "is linked directly to its centre, so no chain of pairwise links can join unrelated images. Byte-identical "
    "copies take part once, through their exact group's keeper."
)
NORMALISATION_RULE = (
    "normalised score = cosine - (b1 + b2) / 2, with b1, b2 the two items' backgrounds; an item's background "
    "is its cosine similarity to its {rank}th most similar item in a random sample of {sample} archive items, "
    "capped at the median + {z:g} MAD of its similarities to that sample (0 = as similar as its usual "
    "look-alikes; the score says by how much a pair stands out above them)"
).format(rank=BACKGROUND_RANK, sample=BACKGROUND_SAMPLE, z=BACKGROUND_CEILING_MADS)


class DuplicatesError(ValueError):
    """A request the user must change (unknown layer, uncalibrated settings, bad threshold)."""


def _f32(x: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(x, dtype=np.float32)


def _bar(total: int, desc: str, progress: bool):
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit="item", disable=not progress, leave=False, dynamic_ncols=True)


def _threads() -> None:
    import faiss

    faiss.omp_set_num_threads(max(1, os.cpu_count() or 1))


# --- background and score normalisation -----------------------------------------------------------------
def background(vectors: np.ndarray, *, sample: int = BACKGROUND_SAMPLE, rank: int = BACKGROUND_RANK,
               ceiling_mads: float = BACKGROUND_CEILING_MADS, seed: int = 0, progress: bool = False) -> np.ndarray:
    """(n, d) -> (n,): how similar each row's usual look-alikes are.

    A random reference sample of the rows stands in for a set of distractors (most of it is unrelated
    to any given item). An item's background is its similarity to its rank-th most similar sample
    member, but never above median + ceiling_mads * MAD of its similarities to the sample (MAD scaled
    to a standard deviation): the item's own copies are outliers of that distribution, so however
    many of them fall into the sample they cannot raise the background beyond that robust ceiling.
    With fewer than `sample` + 1 rows, every other row is in the sample.
    """
    n, d = vectors.shape
    if n < 2:
        return np.zeros(n, np.float32)
    x = _f32(vectors)
    rng = np.random.default_rng(seed)
    ref = np.arange(n) if n <= sample + 1 else np.sort(rng.choice(n, sample, replace=False))
    in_ref = np.zeros(n, bool)
    in_ref[ref] = True
    r = int(min(rank, len(ref) - 1))
    out = np.empty(n, np.float32)
    with _bar(n, "background similarity", progress) as bar:
        for start in range(0, n, CHUNK):
            rows = np.arange(start, min(start + CHUNK, n))
            sims = x[rows] @ x[ref].T
            own = in_ref[rows]
            if own.any():  # an item is not its own background: drop its own entry from its row
                mine = sims[own]
                mine[ref[None, :] == rows[own][:, None]] = -np.inf
                out[rows[own]] = _background_rows(-np.sort(-mine, axis=1)[:, :-1], r, ceiling_mads)
            if not own.all():
                out[rows[~own]] = _background_rows(sims[~own], r, ceiling_mads)
            bar.update(len(rows))
    return out


def _background_rows(sims: np.ndarray, rank: int, ceiling_mads: float) -> np.ndarray:
    m = sims.shape[1]
    lo, hi = (m - 1) // 2, m // 2  # the median is the mean of these two order statistics
    part = np.partition(sims, sorted({m - rank, lo, hi}), axis=1)
    top = part[:, m - rank]
    med = 0.5 * (part[:, lo] + part[:, hi])
    mad = 1.4826 * np.median(np.abs(sims - med[:, None]), axis=1)
    return np.minimum(top, med + ceiling_mads * mad)


def normalise(cosine: np.ndarray, background_a: np.ndarray, background_b: np.ndarray) -> np.ndarray:
    """Pair scores against the background: cosine - (b_a + b_b) / 2.

    0 means "as similar as these items' usual look-alikes"; positive values say by how much the pair
    stands out above them. See docs/duplicates.md.
    """
    assert cosine.shape == background_a.shape == background_b.shape, "pair arrays must have one shape"
    return (cosine - 0.5 * (background_a + background_b)).astype(np.float32)


# --- candidate pairs ------------------------------------------------------------------------------------
def projection(vectors: np.ndarray, dim: int = PCA_DIM, *, seed: int = 0) -> np.ndarray:
    """(d, dim) orthonormal basis close to the top principal directions of the rows (uncentred, so inner
    products of projections approximate inner products of the rows), learned on a sample by subspace
    iteration (a randomised range finder, Halko, Martinsson and Tropp, SIAM Review 2011)."""
    n, d = vectors.shape
    dim = min(dim, d)
    rng = np.random.default_rng(seed)
    sample = _f32(vectors[np.sort(rng.choice(n, min(n, PCA_SAMPLE), replace=False))])
    moment = sample.T @ sample
    q = _f32(rng.normal(size=(d, min(d, dim + 16))))
    for _ in range(4):
        q, _ = np.linalg.qr(moment @ q)
    small = (q.T @ moment @ q).astype(np.float64)
    eigval, eigvec = np.linalg.eigh(small)
    return _f32(q @ eigvec[:, ::-1][:, :dim])


def candidate_pairs(vectors: np.ndarray, threshold: float, bg: np.ndarray | None = None, *,
                    min_cosine: float = -1.0, k: int = NEIGHBOURS, exact_max: int = EXACT_SEARCH_MAX, seed: int = 0,
                    progress: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Pairs (i < j) among each row's k most similar rows whose score is >= threshold (and cosine >= min_cosine).

    vectors (n, d) are L2-normalised; score = cosine, or normalise(cosine, bg[i], bg[j]) when the
    background bg (n,) is given. Returns positions i, j, the score and the cosine, all exact.
    Up to `exact_max` rows the neighbours come from an exact inner-product search. Above it, from a
    FAISS IVF index over a PCA projection built for this job (approximate: a true neighbour can be
    missed); a candidate is then rescored exactly when the projection plus the Cauchy-Schwarz bound
    on the discarded part (|x.y - Px.Py| <= |x - Px| |y - Py|) could reach the threshold.
    """
    import faiss

    n, d = vectors.shape
    if bg is not None:
        assert bg.shape == (n,), f"expected {n} background values, got {bg.shape}"
    k = int(min(k, n - 1))
    empty = (np.zeros(0, np.int64),) * 2 + (np.zeros(0, np.float32),) * 2
    if k <= 0:
        return empty
    _threads()
    x = _f32(vectors)
    half_bg = np.zeros(n, np.float32) if bg is None else _f32(bg) / 2
    if n <= exact_max:
        index, y, resid = faiss.IndexFlatIP(d), x, np.zeros(n, np.float32)
        index.add(x)
    else:
        basis = projection(x, seed=seed)
        y = _f32(x @ basis)
        resid = np.sqrt(np.maximum((x * x).sum(1) - (y * y).sum(1), 0)).astype(np.float32)
        nlist = int(min(4096, max(64, 2 * np.sqrt(n))))
        rng = np.random.default_rng(seed)
        index = faiss.IndexIVFFlat(faiss.IndexFlatIP(y.shape[1]), y.shape[1], nlist, faiss.METRIC_INNER_PRODUCT)
        index.cp.niter, index.cp.seed, index.cp.min_points_per_centroid = 10, seed, 1
        index.train(y[np.sort(rng.choice(n, min(n, nlist * IVF_TRAIN_PER_LIST), replace=False))])
        index.add(y)
        index.nprobe = min(IVF_NPROBE, nlist)
    out_i, out_j, out_s, out_c = [], [], [], []
    with _bar(n, "near-duplicate search", progress) as bar:
        for start in range(0, n, CHUNK):
            rows = np.arange(start, min(start + CHUNK, n))
            approx, cand = index.search(y[rows], k + 1)
            i = np.repeat(rows, cand.shape[1])
            j = cand.ravel()
            a = approx.ravel()
            ok = (j >= 0) & (j != i)
            i, j, a = i[ok], j[ok], a[ok]
            need = threshold + half_bg[i] + half_bg[j]
            bound = a + resid[i] * resid[j]  # for exact search resid = 0: the test is exact
            maybe = (bound >= need) & (bound >= min_cosine)
            i, j = i[maybe], j[maybe]
            cos = np.einsum("nd,nd->n", x[i], x[j]) if len(i) else np.zeros(0, np.float32)
            score = cos if bg is None else normalise(cos, bg[i], bg[j])
            keep = (score >= threshold) & (cos >= min_cosine)
            out_i.append(i[keep]); out_j.append(j[keep]); out_s.append(score[keep]); out_c.append(cos[keep])
            bar.update(len(rows))
    i, j, s, c = (np.concatenate(v) for v in (out_i, out_j, out_s, out_c))
    a, b = np.minimum(i, j), np.maximum(i, j)
    _, first = np.unique(a * n + b, return_index=True)
    return a[first], b[first], s[first].astype(np.float32), np.clip(c[first], -1, 1).astype(np.float32)


# --- grouping --------------------------------------------------------------------------------------------
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
    """Index into `rows` of the item the keeper rule keeps (index/keeper.py; reads the members' files)."""
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
         prefer: list[str] | None = None) -> dict:
    """Group ids by content hash and by descriptor similarity; returns the document of groups.

    ids (n,), vectors (n, d) L2-normalised, rows: n dicts with path, width, height, mtime, size, sha256
    (and captured_at). `prefer`: folders whose members the keeper rule prefers, in order.
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
    x = _f32(vectors[reps])
    bg = None
    if len(reps) >= 2:
        if normalised:
            bg_reps = background(x, progress=progress)
            bg = np.zeros(n, np.float32)
            bg[reps] = bg_reps
        a, b, s, _ = candidate_pairs(x, threshold, bg_reps if normalised else None, k=k, exact_max=exact_max,
                                     min_cosine=-1.0 if min_cosine is None else min_cosine, progress=progress)
        for centre, members in star_groups(len(reps), a, b, s):
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
        "min_cosine": None if min_cosine is None else float(min_cosine),
        "rules": {"exact": EXACT_RULE, "near": NEAR_RULE, "keeper": rule.text,
                  "score": (NORMALISATION_RULE if normalised else "score = cosine similarity of the descriptors")
                  + (f"; a near pair must also have cosine >= {min_cosine:g}" if min_cosine is not None else "")},
        "counts": {"images": int(n), "groups": len(out), "exact": sum(g["kind"] == "exact" for g in out),
                   "near": sum(g["kind"] == "near" for g in out), "images_in_groups": in_groups},
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


# --- the Archive side ------------------------------------------------------------------------------------
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


def resolve_settings(archive, layer: str | None, threshold: float | None,
                     normalised: bool = True) -> tuple[str, float, float | None]:
    """(layer, threshold, cosine floor) to use; refuses a default where the calibration does not hold."""
    names = archive.layer_names
    if layer is None:
        layer = next((name for name in (DEFAULT_LAYER, "parts") if name in names), archive.manifest["default_layer"])
    entry = next((l for l in archive.manifest["layers"] if layer in (l["name"], l["node"])), None)
    if entry is None:
        raise DuplicatesError(f"this archive has no layer {layer!r}; it has: {', '.join(names)}")
    layer = entry["name"]
    floor = MIN_COSINE.get(layer) if normalised else None
    if threshold is not None:
        return layer, float(threshold), floor
    if not normalised:
        raise DuplicatesError("the calibrated thresholds are for the normalised score; with raw cosine "
                              "similarity give --threshold")
    m = archive.manifest
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


def from_archive(archive, *, layer: str | None = None, threshold: float | None = None,
                 normalised: bool = True, progress: bool = False, prefer: list[str] | None = None) -> dict:
    """Run the job over every embedded item of an Archive on one layer."""
    layer, threshold, floor = resolve_settings(archive, layer, threshold, normalised)
    stored_ids, vectors = all_vectors(archive.store(layer))
    rows = {r["id"]: r for r in archive.catalog.db.query(
        f"select {', '.join(ROW_COLUMNS)} from images where status = 'ok'")}
    keep = np.array([int(i) in rows for i in stored_ids], bool)  # skip ids the catalog has not committed
    order = np.flatnonzero(keep)[np.argsort(stored_ids[keep], kind="stable")]  # catalog order: deterministic
    ids, vectors = stored_ids[order], vectors[order]
    doc = find(ids, vectors, [rows[int(i)] for i in ids], threshold=threshold, normalised=normalised,
               min_cosine=floor, progress=progress, layer=layer, prefer=prefer)
    doc["db"] = str(archive.db)
    return doc
