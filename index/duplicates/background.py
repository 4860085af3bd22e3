"""Background similarity of each item and the normalised pair score of the duplicate job (docs/duplicates.md).

An item's background is how similar its usual look-alikes are: its similarity to its 10th most similar
member of a random reference sample of the archive. An item that exists in many versions has those
versions among its most similar sample members, and they would lift its background to their own level
(issue: with 19 versions of every picture, recall fell to 0.62). So the background is taken in two
steps: a first, deep background (the 40th most similar) screens out each item's candidate copies (pairs
standing out above it), then the background proper is taken with the item itself and its candidate
copies counted as typical sample members (replaced by the row's median).
"""
from __future__ import annotations

import numpy as np

from ..common.progress import bar as progress_bar

BACKGROUND_SAMPLE = 500  # random reference sample measuring each item's background
BACKGROUND_RANK = 10  # background = similarity to the item's 10th most similar sample member ...
BACKGROUND_CEILING_MADS = None  # no cap (was median + 5 MAD): screening now keeps copies out, and a cap held
# down the background of items in dense look-alike clusters (pages of text: 1/6 of a large benchmark set)
SCREEN_RANK = 40  # the screening background: the 40th most similar sample member
SCREEN_MARGIN = 0.15  # a pair at least this far above the screening background is a candidate copy
LOCAL_RANK = 32  # the background is at least the similarity of the item's 32nd nearest item in the whole
# archive: beyond 20 versions of one picture with a margin (24 lost 0.03-0.05 recall with 19 versions), so in a
# large archive a dense cluster of look-alikes that the random sample barely touches still raises it
CHUNK = 4096

RULE = (
    "normalised score = cosine - (b1 + b2) / 2, with b1, b2 the two items' backgrounds. An item's background "
    "is its cosine similarity to its {rank}th most similar member of a random sample of {sample} archive items "
    "(the whole archive when smaller), with the item itself and its candidate copies counted as typical sample "
    "members (their similarity replaced by the median of the item's similarities to the sample). A candidate "
    "copy is a neighbour whose cosine stands {margin:g} or more above the mean of the two items' screening "
    "backgrounds, taken the same way at the {screen}th rank without exclusions. So an item's own versions do "
    "not lift its background. The background is then raised to the item's similarity to its {local}th nearest "
    "item in the whole archive (beyond any plausible count of versions), which a dense cluster of look-alikes "
    "reaches"
).format(rank=BACKGROUND_RANK, sample=BACKGROUND_SAMPLE, margin=SCREEN_MARGIN, screen=SCREEN_RANK,
         local=LOCAL_RANK)


def _bar(total: int, desc: str, progress: bool):
    return progress_bar(total, desc, enabled=progress, leave=False)  # plain lines in a log


def background(vectors: np.ndarray, *, sample: int = BACKGROUND_SAMPLE, rank: int = BACKGROUND_RANK,
               ceiling_mads: float | None = BACKGROUND_CEILING_MADS,
               exclude: tuple[np.ndarray, np.ndarray] | None = None,
               seed: int = 0, progress: bool = False) -> np.ndarray:
    """(n, d) -> (n,): each row's similarity to its rank-th most similar sample member, capped.

    A random reference sample of the rows stands in for a set of distractors. Row i's similarities to
    the sample are taken with its own entry, and the entry of every j with (i, j) or (j, i) in
    `exclude` (position arrays a, b), replaced by the median of the row; then the rank-th largest,
    but never above median + ceiling_mads * MAD (MAD scaled to a standard deviation).
    With fewer than `sample` + 1 rows, every row is in the sample.
    """
    n, d = vectors.shape
    if n < 2:
        return np.zeros(n, np.float32)
    x = np.ascontiguousarray(vectors, dtype=np.float32)
    rng = np.random.default_rng(seed)
    ref = np.arange(n) if n <= sample + 1 else np.sort(rng.choice(n, sample, replace=False))
    ref_pos = np.full(n, -1, np.int64)
    ref_pos[ref] = np.arange(len(ref))
    ea, eb = _symmetric_in_sample(exclude, ref_pos, n)
    bounds = np.searchsorted(ea, np.arange(0, n + CHUNK, CHUNK))
    r = int(min(rank, len(ref) - 1))
    out = np.empty(n, np.float32)
    with _bar(n, "background similarity", progress) as bar:
        for c, start in enumerate(range(0, n, CHUNK)):
            rows = np.arange(start, min(start + CHUNK, n))
            sims = x[rows] @ x[ref].T
            mask = np.zeros(sims.shape, bool)
            own = ref_pos[rows] >= 0
            mask[np.flatnonzero(own), ref_pos[rows[own]]] = True
            lo, hi = bounds[c], bounds[c + 1]
            mask[ea[lo:hi] - start, ref_pos[eb[lo:hi]]] = True
            out[rows] = _background_rows(sims, mask, r, ceiling_mads)
            bar.update(len(rows))
    return out


def _symmetric_in_sample(exclude, ref_pos: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Excluded (row, sample member) pairs in both directions, sorted by row."""
    if exclude is None or len(exclude[0]) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    a, b = (np.asarray(v, np.int64) for v in exclude)
    assert a.shape == b.shape, "exclude must be two position arrays of one shape"
    a, b = np.concatenate([a, b]), np.concatenate([b, a])
    keep = (ref_pos[b] >= 0) & (a != b)
    a, b = a[keep], b[keep]
    order = np.argsort(a, kind="stable")
    return a[order], b[order]


def _median(sims: np.ndarray) -> np.ndarray:
    m = sims.shape[1]
    lo, hi = (m - 1) // 2, m // 2
    part = np.partition(sims, sorted({lo, hi}), axis=1)
    return 0.5 * (part[:, lo] + part[:, hi])


def _background_rows(sims: np.ndarray, mask: np.ndarray, rank: int, ceiling_mads: float) -> np.ndarray:
    sims = np.where(mask, _median(sims)[:, None], sims)  # excluded members count as typical ones
    m = sims.shape[1]
    top = np.partition(sims, m - rank, axis=1)[:, m - rank]
    if ceiling_mads is None:
        return top.astype(np.float32)
    med = _median(sims)
    mad = 1.4826 * _median(np.abs(sims - med[:, None]))
    return np.minimum(top, med + ceiling_mads * mad).astype(np.float32)


def normalise(cosine: np.ndarray, background_a: np.ndarray, background_b: np.ndarray) -> np.ndarray:
    """Pair scores against the background: cosine - (b_a + b_b) / 2.

    0 means "as similar as these items' usual look-alikes"; positive values say by how much the pair
    stands out above them. See docs/duplicates.md.
    """
    assert cosine.shape == background_a.shape == background_b.shape, "pair arrays must have one shape"
    return (cosine - 0.5 * (background_a + background_b)).astype(np.float32)


def screened(vectors: np.ndarray, i: np.ndarray, j: np.ndarray, cos: np.ndarray, local: np.ndarray, *,
             seed: int = 0, progress: bool = False) -> tuple[np.ndarray, int]:
    """The background: the sampled one with each item's candidate copies screened out, raised to `local`
    (each item's LOCAL_RANK-th nearest similarity, from the candidate search); returns it and the number of
    candidate-copy pairs. (i, j, cos): neighbour pairs with their cosine (from the candidate search)."""
    assert i.shape == j.shape == cos.shape, "pair arrays must have one shape"
    assert local.shape == (len(vectors),), "one local background per row"
    deep = background(vectors, rank=SCREEN_RANK, seed=seed, progress=progress)
    copy = normalise(cos, deep[i], deep[j]) >= SCREEN_MARGIN
    sampled = background(vectors, exclude=(i[copy], j[copy]), seed=seed, progress=progress)
    return np.maximum(sampled, local), int(copy.sum())
