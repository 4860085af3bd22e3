"""A layer's vectors on disk as segment files, and turning segments into a FAISS index and back.

In the database folder, `stores/<layer>/` holds:
- `codec-<n>.faiss`: the trained, empty IVF index (coarse centroids, the scalar quantizer: 16-bit
  floats or 8-bit ranges, the optional PCA), written when the index type is (re)built; none while the
  store is flat (exact);
- `seg-<n>.npz`: a segment, some of the layer's vectors: `ids` (int64), and either `vectors` (float32,
  flat) or `lists` (int32, the inverted list of each vector) and `codes` (uint8, one row a vector),
  with `codec`, the name of the codec file that encoded them.

The manifest names each layer's codec and segments (see index.vectors.writer); files are written once
and never changed, so a reader that loads the files the manifest names sees one consistent state.
"""
from __future__ import annotations

import re
from dataclasses import asdict, dataclass
from pathlib import Path

import faiss
import numpy as np

from ..common.files import atomic_write
from . import kinds as vi

STORES = "stores"


class StoreFileError(Exception):
    """A segment or codec file that is missing, unreadable or does not belong to its layer's codec."""


@dataclass(frozen=True)
class Segment:
    file: str  # relative to the database folder
    vectors: int
    min_id: int
    max_id: int
    bytes: int  # index data held: codes or vectors, ids and lists

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> "Segment":
        return cls(d["file"], int(d["vectors"]), int(d["min_id"]), int(d["max_id"]), int(d.get("bytes", 0)))

    def may_hold(self, sorted_ids: np.ndarray) -> bool:
        """Whether any of these ids (sorted) falls in this segment's id range."""
        lo = np.searchsorted(sorted_ids, self.min_id, side="left")
        return lo < len(sorted_ids) and sorted_ids[lo] <= self.max_id


STORE_FILE = re.compile(r"^(seg-\d+\.npz|codec-\d+\.faiss)$")  # what a layer's folder holds; set-aside files differ


def is_store_file(name: str) -> bool:
    return bool(STORE_FILE.match(name))


def layer_folder(layer: str) -> str:
    return f"{STORES}/" + re.sub(r"[^A-Za-z0-9._-]", "_", layer)


# --- arrays <-> FAISS indexes ---------------------------------------------------------------------
def ivf_of(index: faiss.Index):
    ivf = vi._ivf(index)
    return None if ivf is None else faiss.downcast_index(ivf)


def pretransformed(index: faiss.Index) -> bool:
    """Whether the index sits behind a vector transform (the PCA option)."""
    return isinstance(faiss.downcast_index(index), faiss.IndexPreTransform)


def extract(index: faiss.Index) -> dict:
    """The arrays of a segment holding every vector of `index` (flat, or IVF grouped by list)."""
    ivf = ivf_of(index)
    if ivf is None:
        inner = faiss.downcast_index(index.index)
        n, d = int(inner.ntotal), int(inner.d)
        vectors = faiss.rev_swig_ptr(inner.get_xb(), n * d).reshape(n, d).copy() if n else np.zeros((0, d), np.float32)
        return {"ids": faiss.vector_to_array(index.id_map).astype(np.int64), "vectors": vectors}
    lists = ivf.invlists
    code_size = int(ivf.code_size)
    ids, codes, which = [], [], []
    for l in range(ivf.nlist):
        size = lists.list_size(l)
        if size:
            ids.append(faiss.rev_swig_ptr(lists.get_ids(l), size).copy())
            codes.append(faiss.rev_swig_ptr(lists.get_codes(l), size * code_size).reshape(size, code_size).copy())
            which.append(np.full(size, l, np.int32))
    if not ids:
        return {"ids": np.zeros(0, np.int64), "lists": np.zeros(0, np.int32),
                "codes": np.zeros((0, code_size), np.uint8)}
    return {"ids": np.concatenate(ids).astype(np.int64), "lists": np.concatenate(which),
            "codes": np.concatenate(codes)}


def fill(index: faiss.Index, arrays: dict) -> None:
    """Add a segment's arrays to an index of the same kind and codec (codes are copied, not re-encoded).

    For IVF the direct map is not updated: call `index_with_map` once everything is in.
    """
    ids = np.ascontiguousarray(arrays["ids"], np.int64)
    if len(ids) == 0:
        return
    ivf = ivf_of(index)
    if ivf is None:
        index.add_with_ids(np.ascontiguousarray(arrays["vectors"], np.float32), ids)
        return
    lists = np.asarray(arrays["lists"], np.int32)
    codes = np.ascontiguousarray(arrays["codes"], np.uint8)
    n, code_size = codes.shape
    assert code_size == ivf.code_size, f"segment codes of {code_size} bytes, codec expects {ivf.code_size}"
    assert lists.shape == (n,) and ids.shape == (n,), "a segment needs one id and one list per code"
    order = np.argsort(lists, kind="stable")
    if not np.array_equal(order, np.arange(n)):
        ids, lists, codes = ids[order], lists[order], codes[order]
    bounds = np.flatnonzero(np.diff(lists)) + 1
    for start, stop in zip(np.r_[0, bounds], np.r_[bounds, n]):
        l = int(lists[start])
        assert 0 <= l < ivf.nlist, f"list {l} outside the codec's {ivf.nlist} lists"
        ivf.invlists.add_entries(l, int(stop - start), faiss.swig_ptr(ids[start:stop]),
                                 faiss.swig_ptr(codes[start:stop]))
    ivf.ntotal += n
    if pretransformed(index):
        index.ntotal += n  # the PCA wrapper counts too


def index_with_map(index: faiss.Index) -> faiss.Index:
    """Give an IVF index its id -> position map (removal by id and reconstruction need it)."""
    ivf = ivf_of(index)
    if ivf is not None:
        ivf.set_direct_map_type(faiss.DirectMap.NoMap)
        ivf.set_direct_map_type(faiss.DirectMap.Hashtable)
    return index


def copy_index(index: faiss.Index) -> faiss.Index:
    """A deep copy (through serialisation: faiss.clone_index cannot copy the L2 normalisation step)."""
    return faiss.deserialize_index(faiss.serialize_index(index))


def empty(dim: int, codec: faiss.Index | None) -> faiss.Index:
    """An empty index of the store's kind: flat, or a copy of the trained codec, ready to add to."""
    if codec is None:
        return vi.flat(dim)
    return index_with_map(copy_index(codec))


def decode(codec: faiss.Index | None, arrays: dict) -> np.ndarray:
    """The float32 vectors of a segment (from the codes for IVF: 8-bit about 1e-3 off, 16-bit floats about
    1e-4), in segment order."""
    if codec is None:
        return np.ascontiguousarray(arrays["vectors"], np.float32)
    ivf = ivf_of(codec)
    codes = np.ascontiguousarray(arrays["codes"], np.uint8)
    if len(codes) == 0:
        return np.zeros((0, codec.d), np.float32)
    x = ivf.sq.decode(codes)
    if pretransformed(codec):  # behind a PCA projection: back to the layer's space
        pre = faiss.downcast_index(codec)
        for i in reversed(range(pre.chain.size())):
            x = faiss.downcast_VectorTransform(pre.chain.at(i)).reverse_transform(x)
    return np.ascontiguousarray(x, np.float32)


def data_bytes(codec: faiss.Index | None, dim: int, n: int) -> int:
    """Bytes a segment of n vectors holds: vectors or codes, 8-byte ids, 4-byte list numbers."""
    if codec is None:
        return n * (4 * dim + 8)
    return n * (int(ivf_of(codec).code_size) + 12)


def subset(arrays: dict, keep: np.ndarray) -> dict:
    return {k: v[keep] for k, v in arrays.items() if k != "codec"}


# --- files ----------------------------------------------------------------------------------------
def write_segment(db: Path, file: str, arrays: dict, codec_file: str | None) -> Segment:
    ids = np.asarray(arrays["ids"], np.int64)
    payload = {k: v for k, v in arrays.items() if k != "codec"}
    payload["codec"] = np.array(codec_file or "")
    path = Path(db) / file
    path.parent.mkdir(parents=True, exist_ok=True)
    atomic_write(path, lambda fh: np.savez(fh, **payload))
    size = sum(int(v.nbytes) for k, v in payload.items() if k != "codec")
    return Segment(file, len(ids), int(ids.min()) if len(ids) else 0, int(ids.max()) if len(ids) else -1, size)


def read_segment(db: Path, segment: Segment, codec_file: str | None) -> dict:
    path = Path(db) / segment.file
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
    except FileNotFoundError:
        raise
    except Exception as exc:
        raise StoreFileError(f"the segment {segment.file} cannot be read: {exc}") from None
    if str(arrays.pop("codec", "")) != (codec_file or ""):
        raise StoreFileError(f"the segment {segment.file} was encoded by another codec than "
                             f"{codec_file or 'none (flat)'}")
    if len(arrays.get("ids", ())) != segment.vectors:
        raise StoreFileError(f"the segment {segment.file} holds {len(arrays.get('ids', ()))} vectors, "
                             f"the manifest says {segment.vectors}")
    return arrays


def read_ids(db: Path, segment: Segment) -> np.ndarray:
    """Only the ids of a segment (the member is read alone from the file)."""
    path = Path(db) / segment.file
    try:
        with np.load(path, allow_pickle=False) as data:
            ids = np.asarray(data["ids"], np.int64)
    except FileNotFoundError:
        raise
    except Exception as exc:
        raise StoreFileError(f"the segment {segment.file} cannot be read: {exc}") from None
    if len(ids) != segment.vectors:
        raise StoreFileError(f"the segment {segment.file} holds {len(ids)} vectors, "
                             f"the manifest says {segment.vectors}")
    return ids


def write_codec(db: Path, file: str, codec: faiss.Index) -> None:
    path = Path(db) / file
    path.parent.mkdir(parents=True, exist_ok=True)
    atomic_write(path, lambda fh: faiss.write_index(codec, faiss.PyCallbackIOWriter(fh.write)))


def read_codec(db: Path, file: str) -> faiss.Index:
    path = Path(db) / file
    if not path.exists():
        raise FileNotFoundError(f"{path}")
    try:
        codec = faiss.read_index(str(path))
    except Exception as exc:
        raise StoreFileError(f"the codec {file} cannot be read: {exc}") from None
    if ivf_of(codec) is None or codec.ntotal != 0:
        raise StoreFileError(f"the codec {file} is not a trained, empty IVF index")
    return codec


def assemble(db: Path, state: dict, files: dict | None = None) -> faiss.Index:
    """One in-memory FAISS index holding every segment a layer's state names (what readers search);
    `files`, if given, receives each segment file's ids (for `update`)."""
    codec = read_codec(db, state["codec"]) if state.get("codec") else None
    index = vi.flat(int(state["dim"])) if codec is None else copy_index(codec)
    for s in state.get("segments", []):
        arrays = read_segment(db, Segment.from_dict(s), state.get("codec"))
        fill(index, arrays)
        if files is not None:
            files[s["file"]] = arrays["ids"]
    return index_with_map(index)


def update(index: faiss.Index, files: dict, db: Path, old: dict, new: dict) -> bool:
    """Bring an assembled index from state `old` to state `new` by loading only the segments that
    changed (an indexer's checkpoint replaces the tail and adds a few). False when that is not
    possible (another codec or dimension: the store was rebuilt) and the index must be loaded anew;
    on an error the index is left half-updated and must be dropped."""
    if old.get("codec") != new.get("codec") or int(old["dim"]) != int(new["dim"]):
        return False
    wanted = {s["file"]: s for s in new.get("segments", [])}
    gone = [f for f in files if f not in wanted]
    if gone:
        vi.remove(index, np.concatenate([files.pop(f) for f in gone]))
    added = [s for f, s in wanted.items() if f not in files]
    for s in added:
        arrays = read_segment(db, Segment.from_dict(s), new.get("codec"))
        fill(index, arrays)
        files[s["file"]] = arrays["ids"]
    if added:
        index_with_map(index)
    return True


def referenced(state: dict | None) -> set[str]:
    if not state:
        return set()
    files = {s["file"] for s in state.get("segments", [])}
    if state.get("codec"):
        files.add(state["codec"])
    return files
