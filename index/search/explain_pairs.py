"""Region pairs that compare content: which cell of the match shows what a cell of the query shows.

Local cell features (one feature-map position, all channels) are centred on the archive's mean cell
feature and L2-normalised, so that what every image has (the response to the frame's border, flat
areas) carries no weight. Candidate pairs are mutual nearest neighbours between the two images' cells.
Most such pairs are wrong on their own; a vote over a few transforms keeps the ones that agree on one
placement of the query in the match (spatial verification in the manner of Philbin, Chum, Isard,
Sivic and Zisserman, "Object retrieval with large vocabularies and fast spatial matching", CVPR 2007).
The candidate transforms: mirrored or not, scale in SCALES, and a shift binned at SHIFT_BIN cells; the
winner is the bin with the largest summed similarity. Convolutional features do not survive a mirror,
so the query's cells are also computed on its mirror image (one more forward pass), and the
orientation whose cells win the vote is the one kept; its cells are mapped back to the query's frame.

Positions are fractions of the image (x right, y down); a transform maps a query position p to
s * p + t in the match (after mirroring p when the match is the query's mirror image). The winning
transform is then refined by least-squares affine fits to the pairs that agree with it (REFINE_ROUNDS),
which lets small rotations and scales between the listed ones through. The agreeing pairs are ranked by
similarity times margin: how much better the matched cell is than the best cell outside its 3 x 3
neighbourhood. A cell of a flat or repetitive area has a near-zero margin: it would match anywhere in it.
"""
from __future__ import annotations

import numpy as np

SCALES = (2.0, 1.55, 1.25, 1.0, 0.8, 0.65, 0.5)  # the query's content in the match at this size
SHIFT_BIN = 1.5  # cells of the match's grid
REFINE_ROUNDS = 2  # least-squares refits of an affine map to the agreeing pairs
INLIER_TOLERANCE = 1.5  # cells: a pair agrees with the winning transform within this distance
RING = 1  # cells along the frame's edges: a pair whose two cells both lie there is never offered


def cell_features(fmap: np.ndarray, centre: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """(C, H, W) feature map -> (H*W, C) cell features centred on `centre` (C,) and L2-normalised,
    and (H*W,) the norm of each centred cell (how far it is from an average cell)."""
    c, h, w = fmap.shape
    x = fmap.reshape(c, h * w).T.astype(np.float64)
    if centre is not None:
        assert centre.shape == (c,), f"the mean cell feature has {centre.shape} channels, the map {c}"
        x = x - centre
    norms = np.linalg.norm(x, axis=1)
    return x / np.maximum(norms, 1e-12)[:, None], norms


def positions(h: int, w: int, mirrored: bool = False) -> np.ndarray:
    """(H*W, 2) cell centres (x, y) as fractions of the image, row-major; mirrored: x -> 1 - x."""
    r, c = np.divmod(np.arange(h * w), w)
    x = (c + 0.5) / w
    return np.stack([1.0 - x if mirrored else x, (r + 0.5) / h], axis=1)


def mutual_nearest(a: np.ndarray, b: np.ndarray, grid_b: tuple[int, int]) -> tuple[np.ndarray, ...]:
    """Rows of a (n, C) and b (m, C), unit vectors: index pairs (i, j) that are each other's nearest
    neighbour, their cosine similarity, and their margin: how much better j is than the best cell of b
    outside j's 3 x 3 neighbourhood (near 0 for a cell of a flat or repetitive area, which could sit
    anywhere in it)."""
    sim = a @ b.T
    best_b = sim.argmax(axis=1)
    best_a = sim.argmax(axis=0)
    i = np.flatnonzero(best_a[best_b] == np.arange(len(a)))
    j = best_b[i]
    rows, cols = grid_b
    rb, cb = np.divmod(np.arange(len(b)), cols)
    rj, cj = np.divmod(j, cols)
    near = (np.abs(rb[None, :] - rj[:, None]) <= 1) & (np.abs(cb[None, :] - cj[:, None]) <= 1)
    second = np.where(near, -np.inf, sim[i]).max(axis=1) if len(i) else np.zeros(0)
    return i, j, sim[i, j], sim[i, j] - second


def vote(pq: np.ndarray, pd: np.ndarray, sim: np.ndarray, grid: tuple[int, int]) -> dict:
    """The transform most pairs agree on: for each scale, the shift t = pd - s * pq of every pair is
    binned (SHIFT_BIN cells of `grid`, the match's (rows, cols)); the bin with the largest summed
    similarity wins, and is refined by affine fits to the pairs that agree with it. Returns {scale,
    shift, votes (the winning bin's summed similarity), inliers (mask of the agreeing pairs)}."""
    rows, cols = grid
    cell = np.array([1.0 / cols, 1.0 / rows])
    best = {"votes": -np.inf}
    for s in SCALES:
        t = pd - s * pq
        bins = np.floor(t / (SHIFT_BIN * cell)).astype(np.int64)
        keys, inverse = np.unique(bins, axis=0, return_inverse=True)
        totals = np.bincount(inverse.ravel(), weights=np.maximum(sim, 0), minlength=len(keys))
        k = int(totals.argmax()) if len(totals) else 0
        if len(totals) and totals[k] > best["votes"]:
            members = inverse.ravel() == k
            shift = np.average(t[members], axis=0, weights=np.maximum(sim[members], 1e-9))
            best = {"scale": s, "shift": shift, "votes": float(totals[k])}
    if not np.isfinite(best["votes"]):
        return {"scale": 1.0, "shift": np.zeros(2), "votes": 0.0, "inliers": np.zeros(len(sim), bool)}
    votes = best["votes"]
    A = best["scale"] * np.eye(2)
    t = best["shift"]
    for _ in range(REFINE_ROUNDS + 1):
        residual = np.abs(pd - (pq @ A.T + t)) / cell
        inliers = residual.max(axis=1) <= INLIER_TOLERANCE
        fitted = fit_affine(pq[inliers], pd[inliers], np.maximum(sim[inliers], 1e-9))
        if fitted is None:
            break
        A, t = fitted
    # The refined map's scale (its area ratio's root) says how large the query's content is in the match.
    return {"scale": float(np.sqrt(abs(np.linalg.det(A)))), "shift": t, "votes": votes, "inliers": inliers}


def fit_affine(p: np.ndarray, q: np.ndarray, w: np.ndarray):
    """Weighted least-squares affine map p -> q (n, 2); None when too few or degenerate points, or
    when the map is far from a plain rescaling (a fit to noise)."""
    if len(p) < 6:
        return None
    X = np.hstack([p, np.ones((len(p), 1))]) * np.sqrt(w)[:, None]
    Y = q * np.sqrt(w)[:, None]
    M, *_ = np.linalg.lstsq(X, Y, rcond=None)
    A, t = M[:2].T, M[2]
    sv = np.linalg.svd(A, compute_uv=False)
    if sv.min() < 0.3 or sv.max() > 3.0 or np.linalg.det(A) <= 0:
        return None
    return A, t


def on_ring(p: np.ndarray, grid: tuple[int, int]) -> np.ndarray:
    """(n, 2) positions -> (n,) True where the cell lies within RING cells of the frame's edge."""
    rows, cols = grid
    c = np.floor(p[:, 0] * cols)
    r = np.floor(p[:, 1] * rows)
    return (c < RING) | (c >= cols - RING) | (r < RING) | (r >= rows - RING)


def match_regions(fq: np.ndarray, fq_mirror: np.ndarray | None, fd: np.ndarray, centre: np.ndarray | None,
                  *, n: int = 8, spread: float = 2.0) -> dict:
    """Region pairs between a query and a match from their local feature maps (C, Hq, Wq) and (C, Hd, Wd).

    fq_mirror is the query's map computed on its mirror image (or None). Returns {pairs: [{query, match,
    similarity}] best first (cell centres as fractions, the query's in its own frame), mirrored, scale,
    votes, agreeing (pairs that agree with the winning transform), candidates (mutual nearest neighbours
    of the winning orientation)}. The pairs offered are agreeing ones, no two closer than `spread` cells
    in the query; none has both cells on the frame's ring.
    """
    c, hq, wq = fq.shape
    cd, hd, wd = fd.shape
    assert c == cd, f"the two feature maps have {c} and {cd} channels"
    b, _ = cell_features(fd, centre)
    pd_all = positions(hd, wd)
    best = None
    for mirrored, fmap in ((False, fq), (True, fq_mirror)):
        if fmap is None:
            continue
        # The mirror image's map, flipped back column for column, lines its cells up with the query's.
        a, _ = cell_features(fmap, centre)
        i, j, sim, margin = mutual_nearest(a, b, (hd, wd))
        pq = positions(hq, wq, mirrored)[i]  # in the query's frame
        pm = np.stack([1.0 - pq[:, 0], pq[:, 1]], axis=1) if mirrored else pq  # in the frame the features saw
        keep = ~(on_ring(pq, (hq, wq)) & on_ring(pd_all[j], (hd, wd)))
        pq, pm, j, sim, margin = pq[keep], pm[keep], j[keep], sim[keep], margin[keep]
        result = vote(pm, pd_all[j], sim, (hd, wd))
        if best is None or result["votes"] > best["votes"]:
            best = {**result, "mirrored": mirrored, "pq": pq, "pd": pd_all[j], "sim": sim, "margin": margin,
                    "candidates": len(sim)}
    inl = best["inliers"]
    pq, pd, sim, margin = best["pq"][inl], best["pd"][inl], best["sim"][inl], best["margin"][inl]
    # Ranked by similarity times margin: on the benchmark, similarity alone put flat areas first, whose
    # cells match anywhere in the flat area (docs/explain.md).
    rank = sim * np.maximum(margin, 0)
    chosen: list[int] = []
    for k in np.argsort(-rank, kind="stable"):
        if all(np.abs((pq[k] - pq[o]) * [wq, hq]).max() >= spread for o in chosen):
            chosen.append(int(k))
        if len(chosen) == n:
            break
    return {
        "pairs": [{"query": pq[k].tolist(), "match": pd[k].tolist(), "similarity": float(sim[k])} for k in chosen],
        "mirrored": bool(best["mirrored"]),
        "scale": float(best["scale"]),
        "votes": float(best["votes"]),
        "agreeing": int(inl.sum()),
        "candidates": int(best["candidates"]),
    }
