"""Archive: the one facade that the CLI, the web app and scripts call.

It composes the rooms below it: the catalog and manifest (index.db), the stores as this process reads
them (index.vectors.reader.Reader), the indexer (index.ingest.indexer.Indexer), the model
(index.model), searches (index.search), the duplicate job (index.duplicates) and the collection map
(index.map). Search, duplicates and the map are mixed in (SearchJobs, DuplicateJobs, MapJobs: each room's
methods of Archive, kept in that room), so this file stays a table of contents.
"""
from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Iterable

import numpy as np
from PIL import Image

from .common.errors import ArchiveError
from .common.units import size_text  # noqa: F401 (web/ and the CLI take it from here)
from .db import manifest as mf
from .db.catalog import Catalog
from .db.folder import CatalogProblem, open_catalog, sqlite_message
from .duplicates.jobs import DuplicateJobs
from .images import renditions as media
from .images.decode import SUPPORTED_EXTENSIONS, DecodeError, open_image
from .images.decode_memory import quiet_pillow_warnings
from .images.preprocess import decode_side, fit_square
from .images.renditions import DISPLAY_SIDE
from .ingest.cluster import connect as connect_cluster
from .ingest.indexer import Indexer
from .ingest.pipeline import configure_threads, cores
from .map.jobs import MapJobs
from .model.backbones import DEFAULT_BACKBONE, NAMES, PRESET_HINTS, Backbone, plain_name
from .model.choice import ENGINES
from .model.model_cache import export_dir
from .model.models import ArchiveModels
from .model.pooling import PCAWhitening
from .model.settings import available_layers, check_settings, new_manifest_apart
from .search.exemplars import Exemplars
from .search.combined import COMBINED, COMBINED_WEIGHTS
from .search.jobs import SearchJobs
from .search.nearest import item_date
from .vectors.kinds import bytes_per_vector_of, type_name
from .vectors.reader import Reader, VectorStore

IMAGE_KINDS = ", ".join(sorted(e.lstrip(".") for e in SUPPORTED_EXTENSIONS))  # for messages

# Archive, and what else the CLI and web/ may use: they import nothing from index but this module.
__all__ = ["Archive", "ArchiveError", "COMBINED", "COMBINED_WEIGHTS", "DEFAULT_BACKBONE", "DISPLAY_SIDE", "DecodeError",
           "ENGINES", "IMAGE_KINDS", "NAMES", "connect_cluster", "fit_square", "item_date", "open_image",
           "quiet_pillow_warnings", "sqlite_message", "type_name"]


def _inference_threads() -> int:
    """Thread pools for a model in this process (torch and FAISS get the cores; buffers reused)."""
    configure_threads(cores())
    return cores()


class Archive(SearchJobs, DuplicateJobs, MapJobs):
    """One database folder: catalog.sqlite, each layer's vector store, manifest.json."""

    def __init__(self, db: Path, manifest: dict, catalog: Catalog | None = None):
        self.db = Path(db)
        self.catalog = catalog if catalog is not None else Catalog(self.db / "catalog.sqlite")
        self.reader = Reader(self.db, manifest, lambda: mf.read(self.db))  # searches: every segment in one index
        self.indexer = Indexer(self.db, self.catalog, self.reader, lambda: self.embedder)  # the only writer
        self.models = ArchiveModels(self.db, lambda: self.manifest, _inference_threads)  # built when first used
        self._explain_baseline = None  # index.search.explain_baseline.Baseline, made by the first explanation

    @property
    def manifest(self) -> dict:
        """The last committed manifest this process read (one dict, shared with the reader and indexer)."""
        return self.reader.manifest

    # --- opening ----------------------------------------------------------------------------
    @classmethod
    def open(cls, db: str | os.PathLike, *, create: bool = False, backbone: str | None = None,
             layers: list[str] | None = None, gem_p: float | None = None, whiten: bool | None = None,
             weights: str | os.PathLike | None = None, lenient: bool = False, engine: str | None = None) -> "Archive":
        """Open the archive in folder `db`; with create=True, make it if absent.

        Settings given for an existing archive must match what it was built with. A missing or
        damaged catalog is refused (lenient=True: a damaged one is opened for `check` to report);
        a database folder this process cannot write is opened read-only (search, info, serve).
        engine: the engine the new archive will be indexed with; unless "torch", a network loaded to
        create it (settings never seen before) is exported for ONNX Runtime in the same child process.
        """
        db = Path(db)
        try:
            manifest = mf.read(db)
        except ValueError as exc:
            raise ArchiveError(str(exc)) from None
        if manifest is None:
            if not create:
                raise ArchiveError(f"{db} is not a kinscope database (no {mf.FILE}); index a folder into it first")
            if db.exists() and any(db.iterdir()):
                raise ArchiveError(f"{db} is not empty and holds no {mf.FILE}; choose a new or empty folder for --db")
            # Exported early only into the per-user cache: a model written into the database folder before
            # its manifest would leave a folder that a second attempt refuses (not empty, no manifest).
            target = None if engine == "torch" else export_dir(db)
            manifest = new_manifest_apart(db, backbone or DEFAULT_BACKBONE, layers, gem_p, whiten, weights,
                                          export_to=None if target is None or db in target.parents else target)
            archive = cls(db, manifest)
            archive.catalog.set_layers([{k: l[k] for k in mf.LAYER_COLUMNS} for l in manifest["layers"]])
            mf.write(db, manifest)
            return archive
        check_settings(db, manifest, backbone=backbone, layers=layers, gem_p=gem_p, whiten=whiten, weights=weights)
        try:
            return cls(db, manifest, open_catalog(db, manifest, lenient=lenient))
        except CatalogProblem as exc:
            raise ArchiveError(str(exc)) from None

    def refresh(self) -> bool:
        """Pick up what an indexer committed since this archive was opened; True if anything changed.

        A loaded store reads only the segments that changed (an indexer's checkpoint replaces its tail
        and adds a few); after a rebuild, or if that fails, it is loaded anew when next needed."""
        if not self.reader.refresh():
            return False
        self.indexer.forget_derived()
        return True

    # --- lazily built parts -----------------------------------------------------------------
    @property
    def layer_names(self) -> list[str]:
        return [l["name"] for l in self.manifest["layers"]]

    def _layer(self, name: str | None) -> dict:
        return mf.layer_entry(self.manifest, name)

    @property
    def backbone(self) -> Backbone:
        return self.models.backbone

    @property
    def embedder(self):
        """The torch Embedder (explanations; queries when no ONNX model is cached): loads torch."""
        return self.models.torch

    @property
    def query_embedder(self):
        """What describes queries: the cached ONNX model without torch, else the torch Embedder."""
        return self.models.query

    def warm(self, layer: str | None = None) -> dict:
        """Load what a first search needs (the query model, one run through it, the layer's store) so
        that it answers as fast as later ones; {engine, seconds}."""
        start = time.perf_counter()
        engine = self.models.warm_query()
        self.store(self._layer(layer)["name"])
        return {"engine": engine, "seconds": time.perf_counter() - start}

    def warm_explanations(self) -> float:
        """Load what a first explanation needs (torch, the backbone, one pass through the default and
        the pair layer); seconds taken. Safe in a thread of its own while searches go on."""
        from .search.explain import explained_nodes

        return self.models.warm_maps(explained_nodes(self.backbone, self._layer(None)))

    def store(self, layer: str) -> VectorStore:
        """The layer's vectors as one in-memory FAISS index, as of the last committed checkpoint (for
        searching; the indexer writes through its own handles)."""
        return self.reader.store(self._layer(layer)["name"])

    def exemplars(self, layer: str) -> Exemplars:
        """Per channel, the archive positions that excite it most (collected while indexing)."""
        return self.indexer.exemplars(layer)

    def whitening(self, layer: str) -> PCAWhitening | None:
        return self.indexer.whitening(layer)

    # --- indexing ---------------------------------------------------------------------------
    def add(self, paths: Iterable[str | os.PathLike], *, progress: bool = True, batch_size: int = 8,
            checkpoint_every: int = 512, engine: str | None = None, workers: int | None = None,
            file_timeout: float | None = None, cluster=None) -> dict:
        """Index every image below these paths, incrementally; returns the run's counts.

        cluster: a Dask client or scheduler address: workers read and embed, this process alone
        writes the catalog and the stores (see index/ingest/cluster.py).

        engine: "auto" (ONNX Runtime when its export pays off, else torch), "torch" or "onnx"; kept in
        the manifest as a preference only (the descriptors of both are interchangeable). workers:
        decode processes (default one per core); file_timeout: seconds before a file's decode is
        abandoned and recorded as a failure (default 120 s; 0 = no limit).
        """
        return self.indexer.add(paths, progress=progress, batch_size=batch_size, checkpoint_every=checkpoint_every,
                                engine=engine, workers=workers, file_timeout=file_timeout, cluster=cluster)

    def reconcile(self) -> dict:
        """Make every store agree with the catalog after an interrupted run (no re-embedding here)."""
        return self.indexer.reconcile()

    # --- searching --------------------------------------------------------------------------
    def query_vector(self, query, layer: str | None = None, box=None) -> np.ndarray:
        """The descriptor of a query: a catalog id, a file path, image bytes or a PIL image.

        With `box` ([x0, y0, x1, y1] as fractions of the image) only that region is described.
        """
        name = self._layer(layer)["name"]
        if isinstance(query, (int, np.integer)) and box is None:
            self.item(int(query))
            try:
                return self.store(name).reconstruct(np.array([int(query)]))[0]
            except RuntimeError:  # committed in the catalog but not in this store: `kinscope index` again
                raise ArchiveError(f"item {int(query)} has no {name} descriptor yet; "
                                   "run kinscope index again") from None
        vector = self.query_embedder.embed_images([self.query_image(query, box)])[name]
        w = self.whitening(name)
        return (w.transform(vector) if w else vector)[0]

    def query_image(self, query, box=None) -> Image.Image:
        """A query as an RGB image: an id (its file), a path, bytes or a PIL image; cropped to `box`."""
        if isinstance(query, (int, np.integer)):
            query = self.item(int(query))["path"]
        return media.query_image(query, decode_side(self.manifest["backbone"]["input_size"]), box)

    def explain(self, query, match: int, *, layer: str | None = None, box=None, mode: str = "centred") -> dict:
        """Why `match` (an id) is similar to the query: heat maps that add up to a score, region pairs,
        and the channels that carried the score with the archive patches that excite them most.

        mode "centred" (default) splits the cosine of the descriptors centred on the archive's mean
        descriptor (what the two share that other images of the archive do not); "cosine" splits the
        raw cosine, the search score. Formulas in index.search.explain_score; see docs/explain.md.
        """
        from .search.explain import ExplainError, explain

        try:
            return explain(self, query, match, layer=layer, box=box, mode=mode)
        except ExplainError as exc:
            raise ArchiveError(str(exc)) from None

    # --- items and images -------------------------------------------------------------------
    def item(self, item_id: int) -> dict:
        """The catalog row of an indexed item (ArchiveError if there is none)."""
        if not 0 <= int(item_id) < 2**62:  # SQLite integers are 64-bit; nothing outside that range exists
            raise ArchiveError(f"no indexed item with id {int(item_id)}")
        rows = self.catalog.get([int(item_id)])
        if int(item_id) not in rows:
            raise ArchiveError(f"no indexed item with id {int(item_id)}")
        return rows[int(item_id)]

    def items(self, *, offset: int = 0, limit: int = 60, folder: str | None = None, name: str | None = None) -> dict:
        """A page of indexed items in catalog order, optionally below one folder, and with `name` in the file
        name (any case; a whole number also finds the item of that id)."""
        return self.catalog.page(offset=offset, limit=limit, folder=folder, name=name)

    def folders(self) -> list[dict]:
        return self.catalog.folders()

    def resolve_folder(self, name: str, cwd: str | None = None) -> dict:
        """A folder as a person names it (absolute, from `cwd`, or below the archive's top folder as the page
        lists it) -> {folder (absolute, or None when no indexed item lies below any reading), items, tried}."""
        from .search.folders import resolve

        return resolve(name, self.folders(), self.catalog.known_roots(), cwd or os.getcwd())

    def thumbnail(self, item_id: int, size: int = 256) -> bytes:
        return self._image_call(media.thumbnail, item_id, size, self.db / media.THUMBS)

    def display_image(self, item_id: int) -> bytes:
        return self._image_call(media.display, item_id)

    def patch(self, item_id: int, box) -> bytes:
        return self._image_call(media.patch, item_id, box)

    def _image_call(self, fn, item_id, *args):
        """Images are made only from the catalogued file itself (media.checked_file): inside the
        indexed roots, with the catalog's size and date."""
        row = self.item(item_id)
        roots = [os.path.realpath(r) for r in self.catalog.known_roots()]
        try:
            with media.checked_file(row, roots) as fh:
                return fn(row, *args, source=fh)
        except media.Unservable as exc:
            raise ArchiveError(f"item {item_id} can no longer be read: {exc}") from None
        except DecodeError as exc:
            raise ArchiveError(f"item {item_id} can no longer be read: {exc.reason}") from None
        except OSError as exc:
            raise ArchiveError(f"item {item_id} can no longer be read: {exc.strerror or exc}") from None
        except ValueError as exc:
            raise ArchiveError(str(exc)) from None

    # --- roots ------------------------------------------------------------------------------
    def roots(self) -> list[dict]:
        """The folders (or files) runs were given: [{root, rows, state}] (see index/db/roots.py)."""
        from .db.roots import listing

        return listing(self.catalog)

    def rename_root(self, old: str, new: str) -> dict:
        """Re-point the rows below a root that moved to where it went; descriptors kept."""
        from .db.roots import rename

        return rename(self.catalog, self.indexer, old, new)

    def forget_root(self, root: str, *, even_if_present: bool = False) -> dict:
        """Drop the rows below a root and their descriptors (files untouched)."""
        from .db.roots import forget

        return forget(self.catalog, self.indexer, root, even_if_present=even_if_present)

    # --- verification ---------------------------------------------------------------------
    def check(self) -> dict:
        """Verify catalog, stores, manifest and files; read-only. {'ok', 'checked', 'findings'}."""
        from .ingest.check import check

        return check(self.catalog, self.reader, self.indexer).as_dict()

    def repair(self, *, progress: bool = True) -> dict:
        """Fix what `check` finds: orphans and temporary files removed, missing descriptors re-embedded."""
        from .ingest.check import repair

        return repair(self.catalog, self.reader, self.indexer, progress=progress)

    # --- reporting --------------------------------------------------------------------------
    def info(self) -> dict:
        summary = self.catalog.summary()
        m = self.manifest
        layers = []
        for l in m["layers"]:
            index = self._index_info(l["name"])
            layers.append({**{k: l[k] for k in mf.LAYER_COLUMNS},
                           "vectors": index["vectors"], "hint": PRESET_HINTS.get(l["name"], ""), "index": index,
                           "bytes_per_vector": bytes_per_vector_of(index)})
        return {
            "db": str(self.db),
            "backbone": {**{k: m["backbone"][k] for k in ("name", "family", "weights_source", "weights_sha256")},
                         "plain": plain_name(m["backbone"]["name"], m["backbone"]["weights_source"])},
            "pooling": m["pooling"],
            "whitening": {"enabled": m["whitening"]["enabled"], "learned": sorted(m["whitening"]["learned"])},
            "default_layer": m["default_layer"],
            "layers": layers,
            "index_bytes_per_image": sum(l["bytes_per_vector"] for l in layers),
            **summary,
        }

    def _index_info(self, layer: str) -> dict:
        """Type, size and build measurements of a layer's index, from the manifest (nothing loaded)."""
        recorded = self.manifest.get("indexes", {}).get(layer)
        if recorded and "stores" in self.manifest:
            return recorded
        return self.store(layer).index_info()  # an archive from before segments, or never checkpointed

    @staticmethod
    def exists(db: str | os.PathLike) -> bool:
        """Whether folder `db` holds a kinscope database (its manifest), without opening it."""
        return (Path(db) / mf.FILE).is_file()

    @staticmethod
    def finds_images(paths: Iterable[str | os.PathLike]) -> bool:
        """Whether `add(paths)` would find any file to index (it stops at the first one found)."""
        from .ingest.scan import finds_images

        try:
            return finds_images(paths)
        except FileNotFoundError as exc:
            raise ArchiveError(str(exc)) from None

    @staticmethod
    def available_layers(backbone: str = DEFAULT_BACKBONE, weights: str | None = None) -> dict:
        """The layers one can index for a backbone, with channels, stride and presets."""
        return available_layers(backbone, weights)

    @staticmethod
    def backbones() -> tuple[str, ...]:
        return NAMES

    def close(self) -> None:
        self.catalog.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def paths_of(self, ids: Iterable[int]) -> list[dict]:
        """[{id, path}] of these indexed items, in id order (ids without an item are left out)."""
        rows = self.catalog.get(sorted({int(i) for i in ids}))
        return [{"id": i, "path": rows[i]["path"]} for i in sorted(rows)]
