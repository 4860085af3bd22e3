"""Re-laying a layer's store out as another index type, one segment at a time.

index.vectors.writer calls this when the store's size calls for another index type (flat -> IVF past
the flat limit, twice the inverted lists after each fourfold growth, flat again when it shrinks) and
when learned whitening maps every vector to a new space. Memory: one source segment, one output
segment, the training sample (at most TRAIN_BYTES) and the probe queries; never the whole store.

- IVF -> IVF in the same space with the same kind of codes: every vector keeps its code (8-bit or
  16-bit float; the scalar quantizer codes the vector itself, not its residual, so codes do not
  depend on the lists). New coarse centroids come
  from k-means on a sample of codes, decoded block by block (faiss.Clustering.train_encoded), and
  each vector moves to the list of its nearest new centroid. Nothing is quantized twice.
- anything else: vectors are decoded, transformed if asked, and encoded by a codec trained on a
  float sample (vector_index.new_ivf), or stored exactly (flat).
- nprobe: the smallest number of lists (to within an eighth) whose recall@10 against exact search
  reaches the policy's target (plus its margin), measured with `probe_queries` stored vectors as
  queries, each query's own id left out. The exact neighbours come from brute force over every
  vector during the same pass; the IVF results of each step are the merge of the results of each
  output segment, which equals a search of the whole index (every segment shares the codec, so the
  same lists are probed). What the codes lose on their own is simulated from their quantization
  steps and multiplies the recall of the lists (see _Calibration); behind PCA it is measured where
  the source is exact and carried.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import faiss
import numpy as np

from . import kinds as vi
from . import segments as sg
from .kinds import FLAT, IVF

TRAIN_BYTES = 256 * 2**20  # the k-means sample, as codes (IVF -> IVF) or float32 vectors
DECODE_ROWS = 8_192  # vectors decoded at a time
FIRST_PASS_SHARE = 16  # nprobe steps up to nlist / 16 are measured in the encoding pass; later ones alone


@dataclass
class Result:
    codec: faiss.Index | None
    segments: list = field(default_factory=list)  # Segment objects, already written
    tail: faiss.Index | None = None  # the last, partial output segment: the new tail
    measured: dict = field(default_factory=dict)


def rebuild(store, kind: str, *, transform: Callable | None, dim: int, write: Callable[[dict], object],
            read: Callable[[object], dict], segment_bytes: int) -> Result:
    """Every vector of `store` (a LayerStore) laid out as `kind`; full output segments go to `write`
    (which returns their Segment), and `read` gives a written one back (to measure recall)."""
    policy = store.policy
    n = len(store)
    rng = np.random.default_rng(policy.seed)
    codes = vi.codes_for(dim, policy, vi.codes_of(store.codec) if store.kind == IVF else None)
    relist = (kind == IVF and store.kind == IVF and transform is None and dim == store.dim
              and not sg.pretransformed(store.codec) and not (policy.pca_dim and policy.pca_dim < dim)
              and vi.codes_of(store.codec) == codes)
    nlist = vi.lists_for(n, policy) if kind == IVF else 0
    if kind == IVF:
        row_bytes = sg.ivf_of(store.codec).code_size if relist else 4 * store.dim
        m = int(min(n, nlist * policy.train_per_list, max(nlist, TRAIN_BYTES // row_bytes)))
    else:
        m = 0
    n_probe = min(n, policy.probe_queries) if kind == IVF else 0
    sample_at = np.sort(rng.choice(n, m, replace=False)) if m else np.zeros(0, np.int64)
    probe_at = np.sort(rng.choice(n, n_probe, replace=False)) if n_probe else np.zeros(0, np.int64)

    sample, probe_ids, queries = _gather(store, sample_at, probe_at, codes=relist, transform=transform)
    if kind == FLAT:
        codec = None
    elif relist:
        codec = _relisted_codec(store.codec, sample, nlist, policy)
    else:
        codec = vi.new_ivf(dim, nlist, policy, codes=codes)
        codec.train(sample)
    del sample

    calib = None
    if kind == IVF and n_probe:
        if sg.pretransformed(codec):  # the PCA option: lists measured in its space; its loss where the source is exact
            exact_source = store.kind == FLAT and transform is None
            calib = _Calibration(queries, probe_ids, nlist, measure_codes=exact_source, space=pretransform_of(codec),
                                 carried=1.0 if exact_source else float(store.measured.get("code_recall_at_10", 1.0)))
        else:
            calib = _Calibration(queries, probe_ids, nlist, steps=code_steps(codec, queries))
    out = _Output(codec, dim, write, read, segment_bytes, calib)
    for ids, lists, codes, vectors in _source_chunks(store, relist, transform):
        if calib is not None:
            calib.exact(ids, vectors)
        if relist:
            _, new_lists = sg.ivf_of(codec).quantizer.search(vectors, 1)
            out.add_codes(ids, new_lists[:, 0].astype(np.int32), codes)
        else:
            out.add_vectors(ids, vectors)
    tail = out.finish()
    measured = {"built_for": n}
    if codec is not None:
        measured["trained_on"] = int(m)
        if calib is not None:
            nprobe, recall = calib.choose(out, policy.target_recall + policy.recall_margin)
            sg.ivf_of(codec).nprobe = nprobe
            sg.ivf_of(tail).nprobe = nprobe
            measured.update(recall_at_10=round(recall, 4), recall_queries=int(n_probe),
                            recall_target=policy.target_recall, code_recall_at_10=round(calib.code_recall, 4))
    return Result(codec, out.segments, tail, measured)


# --- reading the source ---------------------------------------------------------------------------
def _source_chunks(store, relist: bool, transform: Callable | None):
    """(ids, lists, codes, vectors) chunks over every stored vector; vectors decoded and transformed."""
    for _, arrays in store.segment_arrays():
        n = len(arrays["ids"])
        for start in range(0, n, DECODE_ROWS):
            part = {k: v[start:start + DECODE_ROWS] for k, v in arrays.items()}
            vectors = sg.decode(store.codec, part)
            if transform is not None:
                vectors = np.ascontiguousarray(transform(vectors), np.float32)
            yield part["ids"], part.get("lists"), part.get("codes"), vectors


def _gather(store, sample_at: np.ndarray, probe_at: np.ndarray, *, codes: bool, transform):
    """The training sample (codes, or float vectors) and the probe queries, by position in the store."""
    sample_parts, probe_ids, probe_vectors = [], [], []
    offset = 0
    for _, arrays in store.segment_arrays():
        n = len(arrays["ids"])
        s = sample_at[(sample_at >= offset) & (sample_at < offset + n)] - offset
        p = probe_at[(probe_at >= offset) & (probe_at < offset + n)] - offset
        offset += n
        if codes and len(s):
            sample_parts.append(np.ascontiguousarray(arrays["codes"][s]))
        elif len(s):
            sample_parts.append(_vectors(store, arrays, s, transform))
        if len(p):
            probe_ids.append(arrays["ids"][p])
            probe_vectors.append(_vectors(store, arrays, p, transform))
    dim = store.dim
    sample = np.concatenate(sample_parts) if sample_parts else np.zeros((0, dim), np.float32)
    ids = np.concatenate(probe_ids) if probe_ids else np.zeros(0, np.int64)
    queries = np.concatenate(probe_vectors) if probe_vectors else None
    return sample, ids, queries


def _vectors(store, arrays: dict, rows: np.ndarray, transform) -> np.ndarray:
    x = sg.decode(store.codec, sg.subset(arrays, rows))
    return np.ascontiguousarray(transform(x) if transform is not None else x, np.float32)


def _relisted_codec(old: faiss.Index, codes: np.ndarray, nlist: int, policy) -> faiss.Index:
    """An IVF codec with `nlist` new centroids (k-means on decoded codes) and the old quantizer."""
    old_ivf = sg.ivf_of(old)
    d = int(old.d)
    new = vi.new_ivf(d, nlist, policy, codes=vi.codes_of(old))
    ivf = sg.ivf_of(new)
    ivf.sq = old_ivf.sq  # the same quantizer (8-bit ranges): existing codes stay valid
    decoder = faiss.IndexScalarQuantizer(d, old_ivf.sq.qtype, faiss.METRIC_INNER_PRODUCT)
    decoder.sq = old_ivf.sq
    decoder.is_trained = True
    clus = faiss.Clustering(d, nlist, ivf.cp)
    clus.decode_block_size = 4_096  # decoded floats held at a time
    clus.train_encoded(np.ascontiguousarray(codes, np.uint8), decoder, faiss.downcast_index(ivf.quantizer))
    ivf.is_trained = True
    new.is_trained = True
    return new


# --- writing the output ---------------------------------------------------------------------------
class _Output:
    """Fills one output segment at a time; full ones are calibrated, written and let go."""

    def __init__(self, codec, dim: int, write, read, segment_bytes: int, calib):
        self.codec, self.dim, self.write, self.read = codec, dim, write, read
        self.limit, self.calib = segment_bytes, calib
        self.segments = []
        self.index = self._new()

    def _new(self) -> faiss.Index:
        return vi.flat(self.dim) if self.codec is None else sg.copy_index(self.codec)

    def add_vectors(self, ids: np.ndarray, vectors: np.ndarray) -> None:
        for part in self._pieces(len(ids)):
            self.index.add_with_ids(vectors[part], np.ascontiguousarray(ids[part], np.int64))
            self._maybe_emit()

    def add_codes(self, ids: np.ndarray, lists: np.ndarray, codes: np.ndarray) -> None:
        for part in self._pieces(len(ids)):
            sg.fill(self.index, {"ids": ids[part], "lists": lists[part], "codes": codes[part]})
            self._maybe_emit()

    def _pieces(self, n: int):
        """Slices of a chunk that fill the current segment exactly up to the limit, then the next."""
        per = sg.data_bytes(self.codec, self.dim, 1)
        start = 0
        while start < n:
            room = max(1, -(-(self.limit - sg.data_bytes(self.codec, self.dim, int(self.index.ntotal))) // per))
            yield slice(start, min(n, start + room))
            start += room

    def _maybe_emit(self) -> None:
        if sg.data_bytes(self.codec, self.dim, int(self.index.ntotal)) >= self.limit:
            if self.calib is not None:
                self.calib.search(self.index)
            self.segments.append(self.write(sg.extract(self.index)))
            self.index = self._new()

    def finish(self) -> faiss.Index:
        if self.calib is not None and self.index.ntotal:
            self.calib.search(self.index)
        return self.index

    def indexes(self):
        """Each output segment as a searchable index again (written ones read back), then the tail."""
        for segment in self.segments:
            index = self._new()
            sg.fill(index, self.read(segment))
            yield index
        yield self.index


class _Calibration:
    """recall@10 of each nprobe step, from exact neighbours and per-segment IVF results.

    The recall reported estimates recall@10 against exact search on the original descriptors: the
    share of the exact neighbours (among the vectors as the source holds them) that the probed lists
    return, times the share the codes keep when every list is scanned (`code_recall`). The two losses
    are close to independent. For scalar-quantized codes, `code_recall` is simulated: each candidate's score is
    perturbed by the error its codes leave (uniform within half a quantization step per dimension,
    the step of 16-bit floats taken at each dimension's typical magnitude,
    so normal with variance sum_d q_d^2 step_d^2 / 12 after the dot product) and the top 10 compared,
    which needs no exact vectors and follows the archive's density as it grows (tested against the
    exact loss where the source is flat). Behind PCA the loss is measured where the source is exact
    (flat) and carried over by later builds (`carried`).
    """

    CANDIDATES = 100  # exact neighbours kept per query for the simulation

    def __init__(self, queries: np.ndarray, own: np.ndarray, nlist: int, *, steps: np.ndarray | None = None,
                 measure_codes: bool = False, carried: float = 1.0, space=None):
        self.queries = np.ascontiguousarray(queries, np.float32)
        self.own = own
        self.k = 11  # ten neighbours besides the query's own vector
        self.nlist = nlist
        self.truth = faiss.ResultHeap(len(own), self.CANDIDATES + 1, keep_max=True)
        # Behind PCA, the lists are judged against exact search in the codec's own space (`space`), and
        # the codec against exact search in the layer's (`original`, only when measuring its loss).
        self.space = space
        self.in_space = space(self.queries) if space is not None else self.queries
        keep_original = space is not None and measure_codes
        self.original = faiss.ResultHeap(len(own), self.k, keep_max=True) if keep_original else None
        probe = list(vi.probe_steps(nlist))
        self.first = [s for s in probe if s <= max(1, nlist // FIRST_PASS_SHARE)]
        self.later = [s for s in probe if s not in self.first]
        self.found = {s: faiss.ResultHeap(len(own), self.k, keep_max=True) for s in self.first}
        self.steps = steps
        self.every_list = faiss.ResultHeap(len(own), self.k, keep_max=True) if measure_codes else None
        self.code_recall = carried

    def exact(self, ids: np.ndarray, vectors: np.ndarray) -> None:
        labels = np.ascontiguousarray(np.broadcast_to(ids, (len(self.own), len(ids))), np.int64)
        if self.original is not None:
            self.original.add_result(np.ascontiguousarray(self.queries @ vectors.T, np.float32), labels)
        seen = self.space(vectors) if self.space is not None else vectors
        self.truth.add_result(np.ascontiguousarray(self.in_space @ seen.T, np.float32), labels)

    def search(self, index: faiss.Index, steps=None, heaps=None) -> None:
        ivf = sg.ivf_of(index)
        for step in steps or self.first:
            ivf.nprobe = step
            scores, ids = index.search(self.queries, self.k)
            (heaps or self.found)[step].add_result(scores, ids)
        if steps is None and self.every_list is not None:
            ivf.nprobe = self.nlist
            self.every_list.add_result(*index.search(self.queries, self.k))

    def recall(self, heap) -> float:
        """recall@10 of the probed lists alone, against exact search over the vectors as stored."""
        heap.finalize()
        return recall_without_self(heap.I, self.truth.I, self.own)

    def choose(self, out: _Output, target: float) -> tuple[int, float]:
        """The smallest nprobe whose estimated recall reaches `target`, to within an eighth: the steps
        (1, 2, 3, 4, 6, 8, 12, ...) until one reaches it, then halving the gap to the step before (each
        probe scanned costs time, and from 128 to 192 lists is half as much again). Where the target is
        out of reach, the step after which more probes stop paying (the lists' recall gains less than
        0.002). Steps past the first pass are measured one pass each, only if needed. Returns the
        nprobe and its estimated recall."""
        self.truth.finalize()
        if self.every_list is not None:
            self.every_list.finalize()
            reference = self.original if self.original is not None else self.truth
            reference.finalize()
            self.code_recall = recall_without_self(self.every_list.I, reference.I, self.own)
        elif self.steps is not None:
            self.code_recall = simulated_code_recall(self.queries, self.truth.D, self.truth.I, self.own, self.steps)
        best, below = (1, -1.0), None
        for step in self.first + self.later:
            lists = self._lists_recall(out, step)
            if lists * self.code_recall >= target:
                return self._narrow(out, below, step, lists, target) if below else (step, lists * self.code_recall)
            if lists < best[1] + 0.002:
                break
            best, below = (step, lists), step
        return best[0], best[1] * self.code_recall

    def _lists_recall(self, out: _Output, step: int) -> float:
        if step in self.found:
            return self.recall(self.found[step])
        heap = {step: faiss.ResultHeap(len(self.own), self.k, keep_max=True)}
        for index in out.indexes():
            self.search(index, [step], heap)
        return self.recall(heap[step])

    def _narrow(self, out: _Output, low: int, high: int, lists: float, target: float) -> tuple[int, float]:
        """Between `low` (short of the target) and `high` (reaching it, the lists' recall `lists`): the
        smallest nprobe reaching it, found by halving until the gap is at most an eighth of `low`."""
        while high - low > max(1, low // 8):
            mid = (low + high) // 2
            found = self._lists_recall(out, mid)
            if found * self.code_recall >= target:
                high, lists = mid, found
            else:
                low = mid
        return high, lists * self.code_recall


def pretransform_of(codec: faiss.Index):
    """The vector transforms in front of a codec's IVF (PCA, re-normalisation), as a function."""
    pre = faiss.downcast_index(codec)
    chain = [faiss.downcast_VectorTransform(pre.chain.at(i)) for i in range(pre.chain.size())]

    def apply(x: np.ndarray) -> np.ndarray:
        for vt in chain:
            x = vt.apply(np.ascontiguousarray(x, np.float32))
        return x

    return apply


def code_steps(codec: faiss.Index, sample: np.ndarray) -> np.ndarray:
    """Per dimension, the quantization step of an IVF codec: an 8-bit code's range / 255; for 16-bit
    floats, whose step follows each value (10 fraction bits: a step of 2^(e - 10) for a value in
    [2^e, 2^(e+1))), the root mean square of that step over `sample` (vectors as stored)."""
    sq = sg.ivf_of(codec).sq
    d = int(codec.d)
    if sq.qtype == faiss.ScalarQuantizer.QT_fp16:
        x = np.abs(np.asarray(sample, np.float64))
        ulp = np.where(x > 0, np.exp2(np.floor(np.log2(np.maximum(x, 2.0**-14))) - 10), 0.0)
        return np.sqrt((ulp ** 2).mean(axis=0)) if len(x) else np.zeros(d)
    trained = faiss.vector_to_array(sq.trained)
    assert sq.qtype == faiss.ScalarQuantizer.QT_8bit and trained.shape == (2 * d,), "per-dimension 8-bit ranges"
    return (trained[d:] / 255.0).astype(np.float64)  # trained = [minimum (d), range (d)]


def simulated_code_recall(queries: np.ndarray, scores: np.ndarray, ids: np.ndarray, own: np.ndarray,
                          steps: np.ndarray, draws: int = 8, seed: int = 0) -> float:
    """recall@10 of the top 10 by perturbed scores against the top 10 by exact scores (own id left
    out), the perturbation being what the codes do to a dot product (see _Calibration)."""
    sigma = np.sqrt((queries.astype(np.float64) ** 2 * steps ** 2).sum(axis=1) / 12.0)
    rng = np.random.default_rng(seed)
    valid = (ids >= 0) & (ids != own[:, None])
    exact = np.where(valid, scores, -np.inf)
    truth = np.argsort(-exact, axis=1)[:, :10]
    hits = []
    for _ in range(draws):
        noisy = np.where(valid, scores + rng.normal(size=scores.shape) * sigma[:, None], -np.inf)
        found = np.argsort(-noisy, axis=1)[:, :10]
        hits.append([len(set(f) & set(t)) / 10 for f, t in zip(found, truth)])
    return float(np.mean(hits))


def recall_without_self(found: np.ndarray, truth: np.ndarray, own: np.ndarray) -> float:
    """Share of the true 10 nearest found in the first 10, each query's own id left out of both."""
    hits = []
    for f, t, me in zip(found, truth, own):
        t = [i for i in t if i >= 0 and i != me][:10]
        f = [i for i in f if i >= 0 and i != me][:10]
        hits.append(len(set(f) & set(t)) / max(1, len(t)))
    return float(np.mean(hits)) if hits else 1.0
