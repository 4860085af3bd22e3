"""Why a pair matched: the exact split of a GeM cosine score over feature-map positions.

With GeM pooling (exponent p) of a feature map F (positions i, channels k) and L2-normalised pooled
vectors q and d, the score is sum_k q_k d_k. Position i of the query receives
    a_i = sum_k q_k d_k * F_ik^p / sum_j F_jk^p,
so the a_i add up to the score exactly (for p = 1 this is the decomposition of average pooling in
Stylianou, Souvenir and Pless, "Visualizing Deep Similarity Networks", WACV 2019). The same split
applies to the matched image, and the product of both splits divides the score over pairs of
positions (query cell, match cell), which gives region-to-region correspondences.
"""
from __future__ import annotations

import numpy as np
import torch

from ..model.pooling import GEM_EPS, gem

MAX_MAP_SIDE = 32  # heat maps are summed into at most this many cells per side (sums stay exact)
MAX_PAIR_SIDE = 8  # correspondences are computed between cells of at most this grid


def shares(fmap: np.ndarray, p: float) -> np.ndarray:
    """(C, H, W) feature map -> (C, H*W): each position's share of each channel's GeM sum (rows sum to 1)."""
    c, h, w = fmap.shape
    x = np.maximum(fmap.reshape(c, h * w).astype(np.float64), GEM_EPS)
    x = x / x.max(axis=1, keepdims=True)  # scale-free, and no overflow for large p
    xp = x**p
    return xp / xp.sum(axis=1, keepdims=True)


def descriptor(fmap: np.ndarray, p: float) -> np.ndarray:
    """(C, H, W) -> (C,) L2-normalised GeM descriptor, computed exactly as at indexing time."""
    with torch.inference_mode():
        g = gem(torch.from_numpy(np.ascontiguousarray(fmap, dtype=np.float32))[None], p)[0].numpy()
    return (g / max(np.linalg.norm(g), 1e-12)).astype(np.float64)


def block_sum(grid: np.ndarray, max_side: int) -> np.ndarray:
    """Sum a (..., H, W) array into at most max_side x max_side cells (totals are preserved)."""
    h, w = grid.shape[-2:]
    rows = np.linspace(0, h, min(h, max_side) + 1).astype(int)[:-1]
    cols = np.linspace(0, w, min(w, max_side) + 1).astype(int)[:-1]
    return np.add.reduceat(np.add.reduceat(grid, rows, axis=-2), cols, axis=-1)


def cell_box(r: int, c: int, rows: int, cols: int) -> list[float]:
    """Grid cell -> [x0, y0, x1, y1] as fractions of the image (the network sees the whole frame)."""
    return [round(c / cols, 4), round(r / rows, 4), round((c + 1) / cols, 4), round((r + 1) / rows, 4)]


def explain_pair(fq: np.ndarray, fd: np.ndarray, p: float, *, channels: int = 6, pairs: int = 5) -> dict:
    """Split the cosine score of two feature maps (C, Hq, Wq) and (C, Hd, Wd) over positions and channels."""
    cq, hq, wq = fq.shape
    cd, hd, wd = fd.shape
    assert cq == cd, f"the two feature maps have {cq} and {cd} channels"
    q, d = descriptor(fq, p), descriptor(fd, p)
    contrib = q * d  # channel k's part of the score
    score = float(contrib.sum())
    sq, sd = shares(fq, p), shares(fd, p)
    heat_q = (contrib @ sq).reshape(hq, wq)
    heat_d = (contrib @ sd).reshape(hd, wd)
    top = np.argsort(-contrib)[:channels]
    return {
        "score": score,
        "query_map": block_sum(heat_q, MAX_MAP_SIDE),
        "match_map": block_sum(heat_d, MAX_MAP_SIDE),
        "pairs": correspondences(sq.reshape(cq, hq, wq), sd.reshape(cd, hd, wd), contrib, pairs),
        "channels": [
            {"channel": int(k), "contribution": float(contrib[k]), "share": float(contrib[k] / score) if score else 0.0}
            for k in top
        ],
    }


def correspondences(sq: np.ndarray, sd: np.ndarray, contrib: np.ndarray, n: int) -> list[dict]:
    """The n strongest (query cell, match cell) pairs, each cell used once; values sum to the score over all pairs."""
    cq = block_sum(sq, MAX_PAIR_SIDE)  # (C, rq, cq) shares summed per cell
    cd = block_sum(sd, MAX_PAIR_SIDE)
    c, rq, kq = cq.shape
    _, rd, kd = cd.shape
    strength = cq.reshape(c, -1).T @ (contrib[:, None] * cd.reshape(c, -1))  # (cells_q, cells_d)
    out, used_q, used_d = [], set(), set()
    for flat in np.argsort(-strength, axis=None):
        i, j = divmod(int(flat), strength.shape[1])
        if i in used_q or j in used_d:
            continue
        used_q.add(i)
        used_d.add(j)
        out.append({
            "query_box": cell_box(*divmod(i, kq), rq, kq),
            "match_box": cell_box(*divmod(j, kd), rd, kd),
            "value": float(strength[i, j]),
        })
        if len(out) == n:
            break
    return out


def patch_box(r: int, c: int, rows: int, cols: int, stride: int, input_size: int) -> list[float]:
    """A box around feature-map cell (r, c), wide enough to show what that position responds to."""
    side = min(0.45, max(0.12, 3.0 * stride / input_size))
    cx, cy = (c + 0.5) / cols, (r + 0.5) / rows
    x0 = min(max(cx - side / 2, 0.0), 1.0 - side)
    y0 = min(max(cy - side / 2, 0.0), 1.0 - side)
    return [round(x0, 4), round(y0, 4), round(x0 + side, 4), round(y0 + side, 4)]
