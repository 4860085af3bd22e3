"""The exact split of a similarity score over feature-map positions.

GeM pooling (exponent p) of a feature map F (positions i = 1..N, channels k) gives
g_k = (1/N sum_i F_ik^p)^(1/p), and the stored descriptor is q = g / |g|. Each position holds a share
of each channel,
    w_ik = F_ik^p / sum_j F_jk^p        (sum_i w_ik = 1),
so q_k = sum_i w_ik q_k: every component of the descriptor is divided over positions.

Raw cosine (mode "cosine"): s = sum_k q_k d_k; query position i receives
    a_i = sum_k w_ik q_k d_k.

Centred cosine (mode "centred", the default): with m the archive's mean descriptor (the mean of the
stored, L2-normalised descriptors of the layer, index.search.explain_baseline),
    s_c = sum_k (q_k - m_k) (d_k - m_k) / (|q - m| |d - m|),
the cosine of the two descriptors after taking off what an average image of the archive has: what
these two share that other images do not. Channels that every image has, the response to the frame's
border among them, then add almost nothing. Since q_k - m_k = sum_i (w_ik q_k - m_k / N), query
position i receives
    a_i = sum_k (w_ik q_k - m_k / N) (d_k - m_k) / (|q - m| |d - m|):
its part of the query's descriptor less an even share of the average one, against the match's centred
descriptor. A cell can be negative (it looks less like the match than an average cell does). The match
gets the same with its own shares w_jk. Both splits add up to their score exactly (sum_i w_ik = 1).
For m = 0 the centred split is the raw one, and for p = 1 and m = 0 both are the decomposition of
average pooling in Stylianou, Souvenir and Pless, "Visualizing Deep Similarity Networks" (WACV 2019).

form "channel" is another exact split of s_c: a_i = sum_k w_ik (q_k - m_k) (d_k - m_k) / (|q - m| |d - m|),
each channel's part divided over positions as the channel itself is. scripts/bench_explain.py measured
both: on `parts` the even form puts as much heat-map mass on the frame's outer ring of cells as the ring's
share of the area (the channel-wise form 0.05 more, the raw cosine 0.08 more) and more of an original's
mass inside the region that a crop of it shows; so "even" is what the page shows (docs/explain.md).
"""
from __future__ import annotations

import numpy as np
import torch

from ..model.pooling import GEM_EPS, gem

MAX_MAP_SIDE = 32  # heat maps are summed into at most this many cells per side (sums stay exact)
MODES = ("centred", "cosine")
FORMS = ("even", "channel")


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


def split(fq: np.ndarray, fd: np.ndarray, p: float, mean: np.ndarray | None = None, *,
          form: str = "even") -> dict:
    """The score of two feature maps (C, Hq, Wq), (C, Hd, Wd) and its exact split over positions.

    mean None: the raw cosine; else the cosine centred on `mean` (C,). Returns {score, query_map
    (Hq, Wq), match_map (Hd, Wd), contrib (C,): each channel's part of the score, cosine: the raw
    cosine}. form "even": the mean is taken off evenly over positions; "channel": each channel's part
    is divided as the channel is (both are exact; the same when mean is None).
    """
    assert form in FORMS, f"form must be one of {FORMS}"
    cq, hq, wq = fq.shape
    cd, hd, wd = fd.shape
    assert cq == cd, f"the two feature maps have {cq} and {cd} channels"
    q, d = descriptor(fq, p), descriptor(fd, p)
    m = np.zeros(cq) if mean is None else np.asarray(mean, np.float64)
    assert m.shape == (cq,), f"the mean descriptor has shape {m.shape}, the maps {cq} channels"
    nq, nd = max(np.linalg.norm(q - m), 1e-12), max(np.linalg.norm(d - m), 1e-12)
    uq, ud = (q - m) / nq, (d - m) / nd  # centred unit vectors (q, d themselves when m = 0)
    contrib = uq * ud
    sq, sd = shares(fq, p), shares(fd, p)
    if form == "even":
        heat_q = (ud / nq) @ (q[:, None] * sq - m[:, None] / sq.shape[1])
        heat_d = (uq / nd) @ (d[:, None] * sd - m[:, None] / sd.shape[1])
    else:
        heat_q = contrib @ sq
        heat_d = contrib @ sd
    return {"score": float(contrib.sum()), "query_map": heat_q.reshape(hq, wq), "match_map": heat_d.reshape(hd, wd),
            "contrib": contrib, "cosine": float(q @ d)}

