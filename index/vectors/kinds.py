"""The FAISS index types a layer's store can hold, when each is used, and their parameters.

- flat: IndexIDMap2(IndexFlatIP), exact. Used while vectors x dimensions stays within
  `IndexPolicy.flat_work` (a query then takes a few milliseconds on one core), or below `flat_max`.
- ivf-sq8 (the kind's name in manifests, whatever its codes): IndexIVFScalarQuantizer (inverted file,
  Jegou, Douze and Schmid, TPAMI 2011) with 16-bit float codes (FAISS's SQfp16; `IndexPolicy.codes`,
  the default) or 8-bit scalar quantization per dimension ("sq8", half the memory; layers of fewer
  than `IndexPolicy.fp16_below` dimensions still get 16-bit floats); either codes the vector itself,
  not its residual, so retraining the lists never re-quantizes. Trained by spherical k-means on a
  sample of the stored vectors, optionally behind a PCA projection (then re-normalised; scores are
  cosines of the projected vectors). A hash-table direct map keeps ids removable and vectors
  reconstructible. `nprobe` is the smallest number of lists (to within an eighth) whose recall@10,
  measured against exact search with stored vectors as queries, reaches the policy's target.
index.vectors.rebuild builds them (segment by segment); this module holds the types and the policy.

HNSW is not offered for stores: it cannot remove ids, which incremental re-indexing needs.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields

import faiss
import numpy as np

from ..common.errors import ArchiveError

FLAT = "flat"
IVF = "ivf-sq8"
# Per stored vector, beside its codes: the 8-byte id in the list or id map, and the id -> position
# hash table (std::unordered_map: node and bucket, about 40 bytes; bench_search measures the total).
ID_BYTES = 8
LOOKUP_BYTES = 40


@dataclass(frozen=True)
class IndexPolicy:
    flat_work: int = 32_000_000  # exact while vectors x dims <= this: 48k at 672 dims, ~8 ms a query on one core
    flat_max: int | None = None  # or a fixed number of vectors (tests)
    target_recall: float = 0.95  # recall@10 against exact search that nprobe is chosen for
    lists_per_sqrt: float = 4.0  # nlist ~ 4 sqrt(n), rounded to a power of two (common practice: 4-16 sqrt(n))
    train_per_list: int = 40  # k-means sample: this many vectors per list (FAISS warns below 39)
    probe_queries: int = 500  # stored vectors, held out, used as queries to measure recall when building
    recall_margin: float = 0.01  # calibrate for target + margin: the estimate from probe_queries has
                                 # a standard error of about 0.005 (bench_search: new queries vs calibration)
    retrain_growth: float = 2.0  # IVF lists trained again once the store has grown this much since
    pca_dim: int | None = None  # project to this many dimensions before the IVF (memory / dim)
    # The codes of IVF stores: 16-bit floats (FAISS's SQfp16) or 8-bit per dimension ("sq8", half the
    # memory). 8-bit steps are wide beside the gaps between close neighbours: at a million synthetic
    # 672-dim vectors recall@10 levelled off near 0.96 however many lists were probed, so nprobe had to
    # reach 384 of 4096 lists for 0.95 + margin; 16-bit floats keep nearly every neighbour and the same
    # recall needs far fewer lists (docs/benchmarks.md, "Search").
    codes: str = "fp16"
    # With codes="sq8", layers below this many dimensions (after PCA) still get 16-bit floats: there the
    # 8-bit loss is worst (32 dims, 300 000 synthetic vectors: 8-bit codes kept 0.83 of the exact 10
    # nearest, 16-bit floats 0.99; 240 dims: 0.94 and 1.00; a development script, docs/benchmarks.md).
    fp16_below: int = 256
    seed: int = 0

    def __post_init__(self):
        if self.codes not in ("fp16", "sq8"):
            raise ArchiveError(f"the manifest's vector_index codes must be fp16 or sq8, not {self.codes!r}")

    @classmethod
    def from_dict(cls, d: dict | None) -> "IndexPolicy":
        known = {f.name for f in fields(cls)}
        return cls(**{k: v for k, v in (d or {}).items() if k in known})

    def to_dict(self) -> dict:
        return asdict(self)

    def flat_limit(self, dim: int) -> int:
        return self.flat_max if self.flat_max is not None else max(1_000, self.flat_work // max(1, dim))


def flat(dim: int) -> faiss.Index:
    return faiss.IndexIDMap2(faiss.IndexFlatIP(dim))


def _ivf(index: faiss.Index):
    """The IVF part of an index (inside a PCA pre-transform or not), or None for a flat one."""
    try:
        return faiss.extract_index_ivf(index)
    except RuntimeError:
        return None


def kind_of(index: faiss.Index) -> str:
    return IVF if _ivf(index) is not None else FLAT


SQ8, FP16 = "sq8", "fp16"  # the codes of an IVF store
_QTYPES = {SQ8: faiss.ScalarQuantizer.QT_8bit, FP16: faiss.ScalarQuantizer.QT_fp16}


def codes_of(index: faiss.Index) -> str | None:
    """The codes of an IVF index (SQ8 or FP16), None for a flat one."""
    ivf = _ivf(index)
    if ivf is None:
        return None
    qtype = faiss.downcast_index(ivf).sq.qtype
    return next(name for name, q in _QTYPES.items() if q == qtype)


def codes_for(dim: int, policy: IndexPolicy, current: str | None = None) -> str:
    """The codes an IVF store of `dim` dimensions gets (after PCA, if the policy asks for it), rebuilt
    from a store holding `current` codes (None: flat or new). A store of 8-bit codes keeps them where
    the policy would not force 16-bit floats for its size: its vectors' 8-bit error cannot be undone
    by coding them again, which would double their memory for no recall (stores built before 16-bit
    floats were the default keep working as they were)."""
    coded = policy.pca_dim if policy.pca_dim and policy.pca_dim < dim else dim
    if coded < policy.fp16_below:
        return FP16
    return SQ8 if current == SQ8 or policy.codes == SQ8 else FP16


def type_name(info: dict) -> str:
    """A store's index type as shown to people: flat, ivf-sq8 or ivf-fp16."""
    return f"ivf-{info['codes']}" if info.get("codes") else info["type"]


def lists_for(n: int, policy: IndexPolicy) -> int:
    target = policy.lists_per_sqrt * math.sqrt(max(n, 1))
    nlist = 2 ** round(math.log2(max(target, 1)))
    cap = 2 ** int(math.log2(max(1, n // policy.train_per_list)))  # enough training vectors per list
    return int(max(1, min(nlist, cap, 65_536)))


def wanted_kind(kind: str, n: int, dim: int, nlist: int, policy: IndexPolicy,
                built_for: int | None = None) -> str | None:
    """The kind a store of `kind` (with `nlist` lists if IVF, built when it held `built_for` vectors)
    should be rebuilt into at n vectors, or None to keep it."""
    limit = policy.flat_limit(dim)
    if kind == FLAT:
        return IVF if n >= limit else None
    if n < limit // 2:  # shrunk well below the threshold (hysteresis: no flapping)
        return FLAT
    if lists_for(n, policy) >= 2 * nlist:
        return IVF
    # Grown by retrain_growth since the lists were trained: what came since may lie elsewhere (an
    # archive indexed folder by folder drifts), so the lists are trained again and nprobe measured again.
    return IVF if built_for and n >= policy.retrain_growth * built_for else None


def stored_ids(index: faiss.Index) -> np.ndarray:
    ivf = _ivf(index)
    if ivf is None:
        return faiss.vector_to_array(index.id_map).astype(np.int64)
    lists = ivf.invlists
    parts = []
    for l in range(ivf.nlist):
        size = lists.list_size(l)
        if size:
            parts.append(faiss.rev_swig_ptr(lists.get_ids(l), size).copy())
    return np.concatenate(parts).astype(np.int64) if parts else np.zeros(0, np.int64)


def remove(index: faiss.Index, ids: np.ndarray) -> int:
    if _ivf(index) is None:
        return int(index.remove_ids(faiss.IDSelectorBatch(ids)))
    return int(index.remove_ids(faiss.IDSelectorArray(np.unique(ids))))  # the hash-table direct map needs an array


def reconstruct(index: faiss.Index, ids: np.ndarray) -> np.ndarray:
    return index.reconstruct_batch(ids)


def ivf_fields(index: faiss.Index) -> dict:
    """nlist, nprobe, code size, codes and PCA dimension of an IVF index (or codec); {} for a flat one."""
    ivf = _ivf(index)
    if ivf is None:
        return {}
    return dict(nlist=int(ivf.nlist), nprobe=int(ivf.nprobe), code_bytes=int(ivf.code_size),
                codes=codes_of(index), pca_dim=int(ivf.d) if ivf.d != index.d else None)


def index_info(index: faiss.Index) -> dict:
    return {"type": kind_of(index), "vectors": int(index.ntotal), "dim": int(index.d), **ivf_fields(index)}


def bytes_per_vector_of(info: dict) -> float:
    """Memory a searching process holds per stored vector: codes, id, id lookup (an estimate; see
    bench_search), from an `index_info` dict."""
    code = 4 * info["dim"] if info["type"] == FLAT else info["code_bytes"]
    return float(code + ID_BYTES + LOOKUP_BYTES)


# --- building ---------------------------------------------------------------------------------------
def new_ivf(dim: int, nlist: int, policy: IndexPolicy, codes: str | None = None) -> faiss.Index:
    """An untrained IVF index with scalar-quantized codes (`codes`, default as `codes_for` says),
    behind PCA and re-normalisation when policy.pca_dim is set."""
    pca = policy.pca_dim if policy.pca_dim and policy.pca_dim < dim else None
    codes = codes or codes_for(dim, policy)
    spec = (f"PCA{pca},L2norm," if pca else "") + f"IVF{nlist}," + {SQ8: "SQ8", FP16: "SQfp16"}[codes]
    index = faiss.index_factory(dim, spec, faiss.METRIC_INNER_PRODUCT)
    ivf = faiss.downcast_index(_ivf(index))
    ivf.by_residual = False
    # Per-dimension ranges from the sample (8-bit codes), widened by 20% each side: values beyond a
    # sample's range would be clipped (seen on synthetic sets: component errors of 0.01 instead of 0.0006).
    ivf.sq.rangestat = faiss.ScalarQuantizer.RS_minmax
    ivf.sq.rangestat_arg = 0.2
    ivf.cp.spherical = True  # centroids on the unit sphere, as the vectors are
    ivf.cp.niter = 10
    ivf.cp.max_points_per_centroid = policy.train_per_list
    ivf.cp.seed = policy.seed
    return index


def probe_steps(nlist: int):
    """1, 2, 3, 4, 6, 8, 12, ...: powers of two and the midpoints, up to nlist / 4."""
    step, top = 1, max(1, nlist // 4)
    while step <= top:
        yield step
        if step >= 2 and step + step // 2 <= top:
            yield step + step // 2
        step *= 2
