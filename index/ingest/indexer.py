"""The indexer: files below the roots -> catalog rows and every layer's store, incrementally.

One per database folder at a time (the writer lock). A run reconciles the stores with the catalog,
scans the roots folder by folder against the catalog, records removals, moves and failures, then
embeds the pending rows (index.ingest.pipeline, or on a Dask cluster: index.ingest.cluster) with
checkpoints: stores first, then the manifest naming them (the commit), then the catalog rows.
The indexer also keeps each layer's derived files: the PCA whitening and the channel exemplars.
"""
from __future__ import annotations

import errno
import os
import sqlite3
import sys
from pathlib import Path
from typing import Callable, Iterable

import numpy as np

from ..common.errors import ArchiveError
from ..common.locks import writer_lock
from ..common.paths import below
from ..db import manifest as mf
from ..db.catalog import Catalog
from ..db.folder import damaged_message
from ..db.roots import adopt_resolved_roots, drop_empty_gone_roots, gone_roots, missing_root_message
from ..images.renditions import THUMBS, cached_thumbnails
from ..model.choice import checked, export_pays_off
from ..model.pooling import PCAWhitening
from ..search.exemplars import Exemplars
from ..vectors.kinds import IndexPolicy
from ..vectors.reader import Reader
from ..vectors.segments import StoreFileError
from ..vectors.writer import LayerStore
from .pipeline import Job, configure_threads, cores, run
from .scan import diff_by_folder, normalize_roots, walk, walk_roots

DEFAULT_FILE_TIMEOUT = 120.0  # seconds one file may take to read and decode before it is abandoned
WRITE_ERRNOS = {errno.ENOSPC, errno.EROFS, errno.EACCES, errno.EPERM, errno.EDQUOT, errno.EFBIG}
WHITEN_SAMPLE = 20_000  # descriptors the whitening is fitted on (at most)


class Indexer:
    """Writes the catalog and the stores of the archive in `db`; `reader` is the same process's
    reading side (it follows every checkpoint), `torch_embedder` gives the archive's torch Embedder."""

    def __init__(self, db: Path, catalog: Catalog, reader: Reader, torch_embedder: Callable[[], object]):
        self.db = Path(db)
        self.catalog = catalog
        self.reader = reader
        self._torch_embedder = torch_embedder
        self._writers: dict[str, LayerStore] = {}  # appends in bounded memory
        self._whitening: dict[str, PCAWhitening] = {}
        self._exemplars: dict[str, Exemplars] = {}
        self._cluster = None

    @property
    def manifest(self) -> dict:
        return self.reader.manifest

    @property
    def layer_names(self) -> list[str]:
        return [l["name"] for l in self.manifest["layers"]]

    def lock(self):
        """The writer lock: one indexer per database folder."""
        return writer_lock(self.db)

    # --- each layer's store and derived files -----------------------------------------------
    def writer(self, layer: str) -> LayerStore:
        """The indexer's handle on a layer's store (only under the writer lock)."""
        if layer not in self._writers:
            entry = mf.layer_entry(self.manifest, layer)
            state = self.manifest.get("stores", {}).get(entry["name"])
            legacy = self.db / entry["file"]
            try:
                self._writers[layer] = LayerStore(
                    self.db, entry["name"], entry["dim"], state,
                    policy=IndexPolicy.from_dict(self.manifest.get("vector_index")),
                    legacy=legacy if not state and legacy.exists() else None)
            except StoreFileError as exc:
                raise ArchiveError(f"{exc}; run `kinscope check --repair`") from None
        return self._writers[layer]

    def forget_writer(self, layer: str) -> None:
        """Drop a layer's handle (its state changed under it): the next `writer` call opens it anew."""
        self._writers.pop(layer, None)

    def save_stores(self) -> None:
        """Checkpoint: every layer's changes written to new files, then the manifest naming them (the
        commit), then the files it no longer names removed."""
        writers = [self.writer(layer) for layer in self.layer_names]
        states = {w.layer: w.flush() for w in writers}
        before = dict(self.manifest.get("stores", {}))
        self.manifest["format"] = mf.FORMAT
        self.manifest.setdefault("stores", {}).update(states)
        self.manifest["generation"] += 1
        self.manifest["counts"] = {w.layer: len(w) for w in writers}
        self.manifest["indexes"] = {w.layer: w.index_info() for w in writers}
        mf.write(self.db, self.manifest)
        for w in writers:
            w.committed()
        self.reader.follow(before)  # stores loaded for searching in this process

    def exemplars(self, layer: str) -> Exemplars:
        """Per channel, the archive positions that excite it most (collected while indexing)."""
        if layer not in self._exemplars:
            path = self._exemplars_path(layer)
            channels = mf.layer_entry(self.manifest, layer)["channels"]
            self._exemplars[layer] = Exemplars.load(path) if path.exists() else Exemplars(channels)
        return self._exemplars[layer]

    def _exemplars_path(self, layer: str) -> Path:
        file = mf.layer_entry(self.manifest, layer)["file"]
        return self.db / file.replace("vectors-", "exemplars-").replace(".faiss", ".npz")

    def _save_exemplars(self) -> None:
        for layer in self._exemplars:
            self._exemplars[layer].save(self._exemplars_path(layer))

    def whitening(self, layer: str) -> PCAWhitening | None:
        learned = self.manifest["whitening"]["learned"].get(layer)
        if learned and layer not in self._whitening:
            self._whitening[layer] = PCAWhitening.load(self.db / learned["file"])
        return self._whitening.get(layer)

    def forget_derived(self) -> None:
        """Whitening and exemplars are read again when next needed (a newer commit was read)."""
        self._exemplars.clear()
        self._whitening.clear()

    # --- a run ------------------------------------------------------------------------------
    def add(self, paths: Iterable[str | os.PathLike], *, progress: bool = True, batch_size: int = 8,
            checkpoint_every: int = 512, engine: str | None = None, workers: int | None = None,
            file_timeout: float | None = None, cluster=None) -> dict:
        """Index every image below these paths, incrementally; returns the run's counts (see Archive.add)."""
        if engine is not None:
            checked(engine)
        try:
            roots = normalize_roots(paths)
        except FileNotFoundError as exc:
            raise ArchiveError(missing_root_message(self.catalog, self.db, paths, str(exc))) from None
        if not roots:
            raise ArchiveError("give at least one file or folder to index")
        inside_db = below([os.path.realpath(self.db)])
        if any(inside_db(r) for r in roots):
            raise ArchiveError(f"{next(r for r in roots if inside_db(r))} is inside the database folder {self.db}; "
                               "index the archive's folders, not the database")
        sound = self.catalog.quick_check()  # never write into a damaged catalog
        if sound != "ok":
            raise ArchiveError(damaged_message(self.db, sound.splitlines()[0]))
        self._cluster = cluster
        file_timeout = DEFAULT_FILE_TIMEOUT if file_timeout is None else (float(file_timeout) or None)
        with self.lock():
            try:
                return self._add(roots, progress, batch_size, checkpoint_every, engine, workers, file_timeout)
            except (OSError, sqlite3.OperationalError) as exc:
                # Full disk, read-only folder...: every file is replaced atomically, so what is on disk
                # is the last checkpoint, whole.
                if isinstance(exc, OSError) and exc.errno not in WRITE_ERRNOS:
                    raise
                reason = getattr(exc, "strerror", None) or str(exc)
                raise ArchiveError(
                    f"cannot write to the database folder {self.db}: {reason}. Nothing was half-written; "
                    "the archive is as of its last checkpoint. Free space or fix permissions, then run again."
                ) from None

    def _add(self, roots: list[str], progress: bool, batch_size: int, checkpoint_every: int = 512,
             engine: str | None = None, workers: int | None = None, file_timeout: float | None = None) -> dict:
        for layer in self.layer_names:  # files an interrupted run wrote but never committed
            self.writer(layer).remove_leftovers()
        self.reconcile()
        self.catalog.prepare_for_writing()
        adopt_resolved_roots(self.catalog, self)  # roots recorded through a link by earlier versions: same files
        run_id = self.catalog.start_run(roots)
        errors: list[dict] = []
        self._skipped: list[dict] = []  # links to outside the roots, database folders: not indexed
        # Folder by folder: the catalog rows of one folder in memory at a time, not the archive's.
        files = walk(walk_roots(roots), errors, self._skipped, exclude=(os.path.realpath(self.db),))
        cs = diff_by_folder(files, self.catalog.rows_in_folder, self.catalog.folders_under(roots), roots,
                            self.catalog.failures_under(roots), size_known=self.catalog.size_known,
                            rows_with_hash=self.catalog.rows_with_hash)
        gone = np.array(cs.removed + [i for i, _ in cs.changed], np.int64)
        removed = sum(self.writer(layer).remove(gone) for layer in self.layer_names)
        self.catalog.delete_images(cs.removed)
        self.catalog.update_files(
            [(i, {"size": f["size"], "mtime": f["mtime"]}) for i, f in cs.touched]
            + [(i, {"path": f["path"], "size": f["size"], "mtime": f["mtime"]}) for i, f in cs.moved]
            + [(i, {"size": f["size"], "mtime": f["mtime"], "status": "pending"}) for i, f in cs.changed]
        )
        drop_empty_gone_roots(self.catalog)
        self.catalog.clear_failures(cs.gone_failures + [f["path"] for f in cs.new])
        self.catalog.record_failures([{**e, "size": None, "mtime": None} for e in errors], run_id)
        self.catalog.insert_pending(cs.new, run_id)
        if removed or not all(layer in self.manifest.get("stores", {}) for layer in self.layer_names):
            self.save_stores()  # removals are durable before any new work starts
        jobs = [Job(i, p) for i, p in self.catalog.pending(roots)]

        done_rows: list[dict] = []

        def on_batch(ids, descriptors, rows, peaks):
            for layer, vectors in descriptors.items():
                w = self.whitening(layer)
                self.writer(layer).add(ids, w.transform(vectors) if w else vectors)
                self.exemplars(layer).update(ids, *peaks[layer])
            done_rows.extend(rows)

        def on_failures(failures):
            if not failures:
                return
            ids = [f["job"].id for f in failures]
            for layer in self.layer_names:
                self.writer(layer).remove(np.array(ids, np.int64))
            self.catalog.delete_images(ids)
            self.catalog.record_failures(
                [{"path": f["job"].path, "size": f.get("size"), "mtime": f.get("mtime"), "reason": f["error"]}
                 for f in failures], run_id)

        def checkpoint():
            self.save_stores()
            self._save_exemplars()
            self.catalog.mark_embedded(done_rows, run_id)
            done_rows.clear()

        runtime = self.manifest.setdefault("runtime", {})
        if engine is not None:
            runtime["engine"] = engine
        if jobs and self._cluster is not None:
            return self._finish_add(cs, errors, run_id, jobs, on_batch, on_failures, checkpoint,
                                    checkpoint_every, progress)
        embedder = None
        if jobs:
            embedder = self.embedder_for_run(runtime.get("engine", "auto"), len(jobs), say=progress)
            runtime["engine_used"] = embedder.engine.name
        counts = run(jobs, embedder, on_batch, on_failures, checkpoint, batch_size=batch_size,
                     checkpoint_every=checkpoint_every, readers=workers, file_timeout=file_timeout,
                     progress=progress) if jobs else None
        embedded = counts.embedded if counts else 0
        failed = (counts.failed if counts else 0) + len(errors)
        interrupted = bool(counts and counts.interrupted)
        if not interrupted:
            self._maybe_learn_whitening()
        report = {**cs.counts(), "embedded": embedded, "failed": failed}
        self.catalog.finish_run(run_id, "interrupted" if interrupted else "done", report)
        speed = {"engine": counts.engine, "seconds": round(counts.seconds, 3), "peak_rss": counts.peak_rss,
                 "peak_rss_workers": counts.peak_rss_workers} if counts else {}
        return {**report, "run_id": run_id, "interrupted": interrupted, "known_failures": cs.known_failures, **speed,
                "skipped": self._skipped, "gone_roots": gone_roots(self.catalog)}

    def embedder_for_run(self, choice: str, images: int, say: bool = False):
        """What embeds the images of a run: the cached ONNX model without torch when the engine choice
        allows it (exported first, in a child process, when missing and worth it), else torch. say: tell
        stderr before the export (a quiet quarter of a minute otherwise)."""
        from ..model.model_cache import find_model
        from ..model.onnx_embedder import OnnxEmbedder
        from ..model.onnx_engine import EngineError, onnx_available

        if choice != "torch" and onnx_available():
            path = find_model(self.manifest, self.db)
            if path is None and export_pays_off(choice, images):
                if say:
                    print("kinscope: exporting the network for ONNX Runtime (once per model)...",
                          file=sys.stderr, flush=True)
                self._export_engine(required=choice == "onnx")
                path = find_model(self.manifest, self.db)
            if path is not None:
                try:
                    configure_threads(cores())
                    return OnnxEmbedder.for_manifest(path, self.manifest, threads=cores())
                except EngineError as exc:
                    if choice == "onnx":
                        raise ArchiveError(str(exc)) from None
            elif choice == "onnx":
                raise ArchiveError("the onnx engine's model could not be exported (see the message above)")
        embedder = self._torch_embedder()
        try:
            embedder.use_engine("torch")
        except Exception as exc:  # noqa: BLE001 - EngineError, from a module that needs torch
            raise ArchiveError(str(exc)) from None
        return embedder

    def _export_engine(self, *, required: bool) -> None:
        """Export the ONNX model in a child process (`python -m index.model.child --export`): torch is
        loaded there, once per model (the per-user cache, index.model.model_cache), never in the indexer."""
        from ..model.model_cache import export_dir
        from ..model.settings import export_apart

        message = export_apart(self.manifest, export_dir(self.db))
        if message is not None:
            if required:
                raise ArchiveError(f"cannot export the model to ONNX: {message}")
            print(f"kinscope: ONNX export failed ({message}); using torch", file=sys.stderr)

    def _finish_add(self, cs, errors, run_id, jobs, on_batch, on_failures, checkpoint, checkpoint_every, progress):
        """The embedding part of add() on a Dask cluster; the same bookkeeping as on one machine."""
        from . import cluster as dask_run

        client = self._cluster
        own = isinstance(client, str)
        try:
            if own:
                client = dask_run.connect(client)
        except Exception as exc:
            raise ArchiveError(f"cannot reach the Dask scheduler at {self._cluster}: {exc}") from None
        try:
            counts = dask_run.run(jobs, dask_run.worker_settings(self.manifest), on_batch, on_failures, checkpoint,
                                  client=client, checkpoint_every=checkpoint_every, progress=progress)
        finally:
            if own:
                client.close()
        failed = counts.failed + len(errors)
        if not counts.interrupted:
            self._maybe_learn_whitening()
        report = {**cs.counts(), "embedded": counts.embedded, "failed": failed}
        self.catalog.finish_run(run_id, "interrupted" if counts.interrupted else "done", report)
        return {**report, "run_id": run_id, "interrupted": counts.interrupted, "known_failures": cs.known_failures,
                "engine": counts.engine, "seconds": round(counts.seconds, 3),
                "skipped": self._skipped, "gone_roots": gone_roots(self.catalog)}

    # --- keeping the stores and the catalog in agreement -------------------------------------
    def reconcile(self) -> dict:
        """Make every store agree with the catalog after an interrupted run (no re-embedding here)."""
        ok = np.array(self.catalog.ids_with_status("ok"), np.int64)
        dropped, missing = 0, set()
        for layer in self.layer_names:
            stored = self.writer(layer).ids()
            extra = np.setdiff1d(stored, ok)
            dropped += self.writer(layer).remove(extra)
            missing.update(np.setdiff1d(ok, stored).tolist())
        if missing:
            self.catalog.set_status(sorted(missing), "pending")  # they are embedded again by the next add
        if dropped:
            self.save_stores()
        return {"dropped": dropped, "requeued": len(missing)}

    def drop(self, ids: list[int]) -> int:
        """Forget these rows and their descriptors (the caller holds the writer lock). Catalog rows
        first, then the stores: a crash in between leaves only orphan descriptors, which the next run
        drops (`reconcile`), never rows without descriptors."""
        if not ids:
            return 0
        self.catalog.delete_images(ids)
        gone = np.array(sorted(ids), np.int64)
        for layer in self.layer_names:
            self.writer(layer).remove(gone)
        self.save_stores()
        gone_ids = set(ids)
        for p, image_id in cached_thumbnails(self.db / THUMBS):
            if image_id in gone_ids:
                p.unlink(missing_ok=True)
        return len(ids)

    def _maybe_learn_whitening(self) -> None:
        w = self.manifest["whitening"]
        if not w["enabled"] or w["learned"]:
            return
        ids = np.array(self.catalog.ids_with_status("ok"), np.int64)
        if len(ids) < w["min_images"]:
            return
        rng = np.random.default_rng(0)
        sample = np.sort(rng.choice(ids, min(len(ids), WHITEN_SAMPLE), replace=False))
        for layer in self.layer_names:
            writer = self.writer(layer)
            pca = PCAWhitening().fit(writer.reconstruct(sample))
            entry = mf.layer_entry(self.manifest, layer)
            file = f"whitening-{entry['file'].removesuffix('.faiss')}.npz"
            pca.save(self.db / file)
            writer.rebuild(transform=pca.transform, dim=pca.out_dim)  # every stored vector, segment by segment
            self._whitening[layer] = pca
            w["learned"][layer] = {"file": file, "dim": pca.out_dim, "n": len(sample)}
            entry["dim"] = pca.out_dim
        self.save_stores()

