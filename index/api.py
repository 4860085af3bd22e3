"""Archive: the one facade that the CLI, the web app and scripts call."""
from __future__ import annotations

import errno
import fcntl
import os
import sqlite3
import sys
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterable

import numpy as np
from PIL import Image

from . import manifest as mf
from .backbones import DEFAULT_BACKBONE, NAMES, PRESET_HINTS, Backbone, BackboneError, get_backbone
from .catalog import Catalog
from .dbfolder import CatalogProblem, damaged_message, open_catalog
from .decode import DecodeError, open_image
from . import media
from .exemplars import Exemplars
from .pipeline import Job, configure_threads, cores, run
from .pooling import PCAWhitening
from .roots import adopt_resolved_roots, drop_empty_gone_roots, gone_roots, missing_root_message
from .scan import below, diff_by_folder, normalize_roots, walk, walk_roots
from .search import nearest, row_filter
from .layer_store import LayerStore
from .segments import StoreFileError, assemble, update
from .store import VectorStore
from .vector_index import IndexPolicy, bytes_per_vector_of

DEFAULT_GEM_P = 3.0
DEFAULT_FILE_TIMEOUT = 120.0  # seconds one file may take to read and decode before it is abandoned
WRITE_ERRNOS = {errno.ENOSPC, errno.EROFS, errno.EACCES, errno.EPERM, errno.EDQUOT, errno.EFBIG}
DEFAULT_WHITEN_MIN_IMAGES = 1000
WHITEN_SAMPLE = 20_000  # descriptors the whitening is fitted on (at most)


class ArchiveError(Exception):
    """Anything the user must fix: a plain sentence, never a stack trace."""


class Archive:
    """One database folder: catalog.sqlite, one FAISS index per layer, manifest.json."""

    def __init__(self, db: Path, manifest: dict, catalog: Catalog | None = None):
        self.db = Path(db)
        self.manifest = manifest
        self.catalog = catalog if catalog is not None else Catalog(self.db / "catalog.sqlite")
        self._backbone: Backbone | None = None
        self._embedder = None
        self._stores: dict[str, VectorStore] = {}  # readers: every segment in one FAISS index
        self._writers: dict[str, LayerStore] = {}  # the indexer: appends in bounded memory
        self._whitening: dict[str, PCAWhitening] = {}
        self._exemplars: dict[str, Exemplars] = {}
        self._explain_baseline = None  # index.explain_baseline.Baseline, made by the first explanation

    # --- opening ----------------------------------------------------------------------------
    @classmethod
    def open(
        cls,
        db: str | os.PathLike,
        *,
        create: bool = False,
        backbone: str | None = None,
        layers: list[str] | None = None,
        gem_p: float | None = None,
        whiten: bool | None = None,
        weights: str | os.PathLike | None = None,
        lenient: bool = False,
    ) -> "Archive":
        """Open the archive in folder `db`; with create=True, make it if absent.

        Settings given for an existing archive must match what it was built with. A missing or
        damaged catalog is refused (lenient=True: a damaged one is opened for `check` to report);
        a database folder this process cannot write is opened read-only (search, info, serve).
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
            manifest = cls._new_manifest_apart(db, backbone or DEFAULT_BACKBONE, layers, gem_p, whiten, weights)
            archive = cls(db, manifest)
            archive.catalog.set_layers([{k: l[k] for k in ("name", "node", "channels", "stride", "dim")} for l in manifest["layers"]])
            mf.write(db, manifest)
            return archive
        asked = {"backbone": backbone, "layers": layers, "gem_p": gem_p, "whiten": whiten}
        if weights is not None:
            try:
                asked["weights_sha256"] = get_backbone(backbone or manifest["backbone"]["name"], weights).weights.sha256()
            except BackboneError as exc:
                raise ArchiveError(str(exc)) from None
        problems = mf.differences(manifest, asked)
        if problems:
            raise ArchiveError(
                f"{db} was built with other settings:\n  " + "\n  ".join(problems)
                + "\nUse a new --db folder for these settings, or leave them out to use the archive's own."
            )
        try:
            return cls(db, manifest, open_catalog(db, manifest, lenient=lenient))
        except CatalogProblem as exc:
            raise ArchiveError(str(exc)) from None

    @classmethod
    def _new_manifest_apart(cls, db, backbone_name, layer_names, gem_p, whiten, weights) -> dict:
        """A new archive's manifest. Resolving its layers loads the model, so unless this process
        already holds torch, that happens in a child process (`python -m index.engines
        --new-manifest`): an indexer creating its archive then stays without torch (about 0.7 GB)."""
        import json
        import subprocess

        if "torch" in sys.modules:
            return cls._new_manifest(db, backbone_name, layer_names, gem_p, whiten, weights)
        asked = {"db": str(db), "backbone": backbone_name, "layers": layer_names, "gem_p": gem_p,
                 "whiten": whiten, "weights": None if weights is None else str(weights)}
        out = subprocess.run([sys.executable, "-m", "index.engines", "--new-manifest"], input=json.dumps(asked),
                             capture_output=True, text=True)
        try:
            answer = json.loads(out.stdout.strip().splitlines()[-1])
        except (IndexError, ValueError):
            message = (out.stderr.strip().splitlines() or ["no answer"])[-1]
            raise ArchiveError(f"cannot load the backbone to create the archive: {message}") from None
        if "error" in answer:
            raise ArchiveError(answer["error"])
        return answer["manifest"]

    @staticmethod
    def _new_manifest(db, backbone_name, layer_names, gem_p, whiten, weights) -> dict:
        from .layers import resolve_layers

        try:
            backbone = get_backbone(backbone_name, weights)
            model = backbone.load()
            layers = resolve_layers(backbone, model, list(layer_names or backbone.default_layers))
        except BackboneError as exc:
            raise ArchiveError(str(exc)) from None
        p = DEFAULT_GEM_P if gem_p is None else float(gem_p)
        if p <= 0:
            raise ArchiveError(f"the GeM exponent must be positive, got {p}")
        db.mkdir(parents=True, exist_ok=True)
        names = [l.name for l in layers]
        default = backbone.default_search_layer if backbone.default_search_layer in names else names[0]
        return {
            "format": mf.FORMAT,
            "created_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "backbone": backbone.manifest(),
            "layers": [{**l.manifest(), "dim": l.channels, "file": mf.store_file(l.name)} for l in layers],
            "default_layer": default,
            "pooling": {"method": "GeM", "p": p, "normalisation": "L2"},
            "whitening": {"enabled": bool(whiten), "min_images": DEFAULT_WHITEN_MIN_IMAGES, "learned": {}},
            "generation": 0,
            "stores": {},
            "versions": mf.versions(),
        }

    def refresh(self) -> bool:
        """Pick up what an indexer committed since this archive was opened; True if anything changed.

        A loaded store reads only the segments that changed (an indexer's checkpoint replaces its tail
        and adds a few); after a rebuild, or if that fails, it is loaded anew when next needed."""
        try:
            current = mf.read(self.db)
        except ValueError:
            return False
        if not current or current.get("generation") == self.manifest.get("generation"):
            return False
        before, self.manifest = self.manifest, current
        self._update_loaded(before.get("stores", {}))
        self._exemplars.clear()
        self._whitening.clear()
        return True

    def _update_loaded(self, before: dict) -> None:
        """Stores loaded for searching follow the manifest's new states (from `before`, the states they
        were loaded at): by the segments that changed, or loaded anew when next needed."""
        for layer, store in list(self._stores.items()):
            old, new = before.get(layer), self.manifest.get("stores", {}).get(layer)
            try:
                kept = bool(old and new and store.files is not None
                            and update(store.index, store.files, self.db, old, new))
            except (OSError, StoreFileError, RuntimeError):
                kept = False
            if kept:
                store.measured = dict(new.get("measured") or {})
            else:
                del self._stores[layer]

    # --- lazily built parts -----------------------------------------------------------------
    @property
    def layer_names(self) -> list[str]:
        return [l["name"] for l in self.manifest["layers"]]

    def _layer(self, name: str | None) -> dict:
        name = name or self.manifest["default_layer"]
        for layer in self.manifest["layers"]:
            if name in (layer["name"], layer["node"]):
                return layer
        raise ArchiveError(f"this archive has no layer {name!r}; it has: {', '.join(self.layer_names)}")

    @property
    def backbone(self) -> Backbone:
        if self._backbone is None:
            b = self.manifest["backbone"]
            packaged = b["weights_source"] != "file named by the user"
            try:
                backbone = get_backbone(b["name"], None if packaged else b["weights_file"])
            except BackboneError as exc:
                raise ArchiveError(str(exc)) from None
            if backbone.weights.sha256() != b["weights_sha256"]:
                raise ArchiveError(
                    f"the weights of {b['name']} at {backbone.weights.path} differ from the ones this archive "
                    "was built with (sha256 mismatch); its descriptors would not be comparable"
                )
            self._backbone = backbone
        return self._backbone

    @property
    def embedder(self):
        if self._embedder is None:
            from .embed import Embedder
            from .layers import Layer

            configure_threads(cores())  # torch and FAISS get the cores; large buffers are reused
            model = self.backbone.load()
            layers = [Layer(l["name"], l["node"], l["channels"], l["stride"]) for l in self.manifest["layers"]]
            # Queries use ONNX Runtime only when its model is already cached (readers never write).
            preference = self.manifest.get("runtime", {}).get("engine", "auto")
            self._embedder = Embedder(self.backbone, model, layers, self.manifest["pooling"]["p"],
                                      engine="torch" if preference == "torch" else "auto",
                                      cache_dir=self.db / "engines", may_export=False)
        return self._embedder

    def store(self, layer: str) -> VectorStore:
        """The layer's vectors as one in-memory FAISS index, as of the last committed checkpoint (for
        searching; the indexer writes through `_writer`)."""
        if layer not in self._stores:
            self._stores[layer] = self._load_store(layer)
        return self._stores[layer]

    def _load_store(self, layer: str, attempts: int = 5) -> VectorStore:
        for attempt in range(attempts):
            entry = self._layer(layer)
            state = self.manifest.get("stores", {}).get(entry["name"])
            try:
                if state:
                    files: dict = {}
                    store = VectorStore(int(state["dim"]), assemble(self.db, state, files), measured=state.get("measured"))
                    store.files = files
                    return store
                legacy = self.db / entry["file"]  # a store from before segments: one FAISS file
                if legacy.exists():
                    return VectorStore.load(legacy, measured=self.manifest.get("indexes", {}).get(layer))
                return VectorStore(entry["dim"])
            except FileNotFoundError:
                # An indexer committed a newer state and removed files of the one read: read it again.
                if attempt + 1 == attempts or not self._reread_manifest():
                    raise ArchiveError(f"the vector store of layer {layer} names files that are missing; "
                                       "run `kinscope check`") from None
            except StoreFileError as exc:
                raise ArchiveError(f"{exc}; run `kinscope check`") from None
        raise AssertionError("unreachable")

    def _reread_manifest(self) -> bool:
        try:
            current = mf.read(self.db)
        except ValueError:
            return False
        changed = bool(current) and current.get("generation") != self.manifest.get("generation")
        if changed:
            self.manifest = current
        return changed

    def _writer(self, layer: str) -> LayerStore:
        """The indexer's handle on a layer's store (only under the writer lock)."""
        if layer not in self._writers:
            entry = self._layer(layer)
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

    def exemplars(self, layer: str) -> Exemplars:
        """Per channel, the archive positions that excite it most (collected while indexing)."""
        if layer not in self._exemplars:
            entry = self._layer(layer)
            path = self.db / entry["file"].replace("vectors-", "exemplars-").replace(".faiss", ".npz")
            self._exemplars[layer] = Exemplars.load(path) if path.exists() else Exemplars(entry["channels"])
        return self._exemplars[layer]

    def _save_exemplars(self) -> None:
        for layer in self._exemplars:
            entry = self._layer(layer)
            self._exemplars[layer].save(self.db / entry["file"].replace("vectors-", "exemplars-").replace(".faiss", ".npz"))

    def whitening(self, layer: str) -> PCAWhitening | None:
        learned = self.manifest["whitening"]["learned"].get(layer)
        if learned and layer not in self._whitening:
            self._whitening[layer] = PCAWhitening.load(self.db / learned["file"])
        return self._whitening.get(layer)

    # --- indexing ---------------------------------------------------------------------------
    def add(self, paths: Iterable[str | os.PathLike], *, progress: bool = True, batch_size: int = 8,
            checkpoint_every: int = 512, engine: str | None = None, workers: int | None = None,
            file_timeout: float | None = None, cluster=None) -> dict:
        """Index every image below these paths, incrementally; returns the run's counts.

        cluster: a Dask client or scheduler address: workers read and embed, this process alone
        writes the catalog and the stores (see index/cluster.py).

        engine: "auto" (ONNX Runtime when its export pays off, else torch), "torch" or "onnx"; kept in
        the manifest as a preference only (the descriptors of both are interchangeable). workers:
        decode processes (default one per core); file_timeout: seconds before a file's decode is
        abandoned and recorded as a failure (default DEFAULT_FILE_TIMEOUT; 0 = no limit).
        """
        from .onnx_engine import ENGINES

        if engine is not None and engine not in ENGINES:
            raise ArchiveError(f"unknown engine {engine!r}; choose one of: {', '.join(ENGINES)}")
        try:
            roots = normalize_roots(paths)
        except FileNotFoundError as exc:
            raise ArchiveError(missing_root_message(self, paths, str(exc))) from None
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
        with self._writer_lock():
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
            self._writer(layer).remove_leftovers()
        self.reconcile()
        self.catalog.prepare_for_writing()
        adopt_resolved_roots(self)  # roots recorded through a link by earlier versions: same files
        run_id = self.catalog.start_run(roots)
        errors: list[dict] = []
        self._skipped: list[dict] = []  # links to outside the roots, database folders: not indexed
        # Folder by folder: the catalog rows of one folder in memory at a time, not the archive's.
        files = walk(walk_roots(roots), errors, self._skipped, exclude=(os.path.realpath(self.db),))
        cs = diff_by_folder(files, self.catalog.rows_in_folder, self.catalog.folders_under(roots), roots,
                            self.catalog.failures_under(roots), size_known=self.catalog.size_known,
                            rows_with_hash=self.catalog.rows_with_hash)
        gone = np.array(cs.removed + [i for i, _ in cs.changed], np.int64)
        removed = sum(self._writer(layer).remove(gone) for layer in self.layer_names)
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
            self._save_stores()  # removals are durable before any new work starts
        jobs = [Job(i, p) for i, p in self.catalog.pending(roots)]

        done_rows: list[dict] = []

        def on_batch(ids, descriptors, rows, peaks):
            for layer, vectors in descriptors.items():
                w = self.whitening(layer)
                self._writer(layer).add(ids, w.transform(vectors) if w else vectors)
                self.exemplars(layer).update(ids, *peaks[layer])
            done_rows.extend(rows)

        def on_failures(failures):
            if not failures:
                return
            ids = [f["job"].id for f in failures]
            for layer in self.layer_names:
                self._writer(layer).remove(np.array(ids, np.int64))
            self.catalog.delete_images(ids)
            self.catalog.record_failures(
                [{"path": f["job"].path, "size": f.get("size"), "mtime": f.get("mtime"), "reason": f["error"]}
                 for f in failures], run_id)

        def checkpoint():
            self._save_stores()
            self._save_exemplars()
            self.catalog.mark_embedded(done_rows, run_id)
            done_rows.clear()

        runtime = self.manifest.setdefault("runtime", {})
        if engine is not None:
            runtime["engine"] = engine
        if jobs and getattr(self, "_cluster", None) is not None:
            return self._finish_add(cs, errors, run_id, jobs, on_batch, on_failures, checkpoint,
                                    checkpoint_every, progress)
        embedder = None
        if jobs:
            embedder = self._indexing_embedder(runtime.get("engine", "auto"), len(jobs))
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

    def _indexing_embedder(self, choice: str, images: int):
        """What embeds the images of a run: the cached ONNX model without torch when the engine choice
        allows it (exported first, in a child process, when missing and worth it), else torch."""
        from .onnx_embed import OnnxEmbedder
        from .onnx_engine import AUTO_EXPORT_MIN_IMAGES, EngineError, cached_model_path, onnx_available

        if choice != "torch" and onnx_available():
            b = self.manifest["backbone"]
            path = cached_model_path(self.db / "engines", b, [l["node"] for l in self.manifest["layers"]],
                                     self.manifest["pooling"]["p"])
            if not path.exists() and (choice == "onnx" or images >= AUTO_EXPORT_MIN_IMAGES):
                self._export_engine(required=choice == "onnx")
            if path.exists():
                try:
                    configure_threads(cores())
                    return OnnxEmbedder(path, self.layer_names, size=b["input_size"], mean=b["mean"], std=b["std"],
                                        threads=cores())
                except EngineError as exc:
                    if choice == "onnx":
                        raise ArchiveError(str(exc)) from None
            elif choice == "onnx":
                raise ArchiveError("the onnx engine's model could not be exported (see the message above)")
        try:
            self.embedder.use_engine("torch")
        except Exception as exc:  # noqa: BLE001 - EngineError, from a module that needs torch
            raise ArchiveError(str(exc)) from None
        return self.embedder

    def _export_engine(self, *, required: bool) -> None:
        """Export the ONNX model in a child process (`python -m index.engines DB`): torch is loaded
        there, once per database, and never in the indexer."""
        import subprocess
        import sys

        out = subprocess.run([sys.executable, "-m", "index.engines", str(self.db)], capture_output=True, text=True)
        if out.returncode != 0:
            message = (out.stderr.strip().splitlines() or ["unknown error"])[-1]
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

    def _save_stores(self) -> None:
        """Checkpoint: every layer's changes written to new files, then the manifest naming them (the
        commit), then the files it no longer names removed."""
        writers = [self._writer(layer) for layer in self.layer_names]
        states = {w.layer: w.flush() for w in writers}
        before = dict(self.manifest.get("stores", {}))
        self.manifest["format"] = mf.FORMAT
        self.manifest.setdefault("stores", {}).update(states)
        self.manifest["generation"] += 1
        self.manifest["counts"] = {w.layer: len(w) for w in writers}
        self.manifest["indexes"] = {w.layer: w.describe() for w in writers}
        mf.write(self.db, self.manifest)
        for w in writers:
            w.committed()
        self._update_loaded(before)  # stores loaded for searching in this process

    def _writer_lock(self):
        archive = self

        class _Lock:
            def __enter__(self):
                try:
                    self.fh = open(archive.db / "indexer.lock", "a+")
                except OSError as exc:
                    raise ArchiveError(f"cannot write to the database folder {archive.db}: {exc.strerror}") from None
                try:
                    fcntl.flock(self.fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
                except BlockingIOError:
                    self.fh.close()
                    raise ArchiveError(
                        f"another kinscope indexer is working on {archive.db}; wait for it to finish"
                    ) from None
                return self

            def __exit__(self, *exc):
                fcntl.flock(self.fh, fcntl.LOCK_UN)
                self.fh.close()

        return _Lock()

    def reconcile(self) -> dict:
        """Make every store agree with the catalog after an interrupted run (no re-embedding here)."""
        ok = np.array(self.catalog.ids_with_status("ok"), np.int64)
        dropped, missing = 0, set()
        for layer in self.layer_names:
            stored = self._writer(layer).ids()
            extra = np.setdiff1d(stored, ok)
            dropped += self._writer(layer).remove(extra)
            missing.update(np.setdiff1d(ok, stored).tolist())
        if missing:
            self.catalog.set_status(sorted(missing), "pending")  # they are embedded again by the next add
        if dropped:
            self._save_stores()
        return {"dropped": dropped, "requeued": len(missing)}

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
            writer = self._writer(layer)
            pca = PCAWhitening().fit(writer.reconstruct(sample))
            file = f"whitening-{self._layer(layer)['file'].removesuffix('.faiss')}.npz"
            pca.save(self.db / file)
            writer.rebuild(transform=pca.transform, dim=pca.out_dim)  # every stored vector, segment by segment
            self._whitening[layer] = pca
            w["learned"][layer] = {"file": file, "dim": pca.out_dim, "n": len(sample)}
            self._layer(layer)["dim"] = pca.out_dim
        self._save_stores()

    # --- searching --------------------------------------------------------------------------
    def describe(self, query, layer: str | None = None, box=None) -> np.ndarray:
        """The descriptor of a query: a catalog id, a file path, image bytes or a PIL image.

        With `box` ([x0, y0, x1, y1] as fractions of the image) only that region is described.
        """
        name = self._layer(layer)["name"]
        if isinstance(query, (int, np.integer)) and box is None:
            self.item(int(query))
            try:
                return self.store(name).reconstruct(np.array([int(query)]))[0]
            except RuntimeError:  # committed in the catalog but not in this store: `kinscope index` again
                raise ArchiveError(f"item {int(query)} has no {name} descriptor yet; run kinscope index again") from None
        vector = self.embedder.embed_images([self.query_image(query, box)])[name]
        w = self.whitening(name)
        return (w.transform(vector) if w else vector)[0]

    def query_image(self, query, box=None) -> Image.Image:
        """A query as an RGB image: an id (its file), a path, bytes or a PIL image; cropped to `box`."""
        if isinstance(query, (int, np.integer)):
            query = self.item(int(query))["path"]
        if isinstance(query, Image.Image):
            image = query.convert("RGB")
        else:
            if isinstance(query, (str, os.PathLike)) and not os.path.isfile(query):
                raise ArchiveError(f"query image not found: {query}")
            try:
                # Decoded exactly as at indexing time, so a file's query descriptor equals its stored one;
                # a region needs the full resolution.
                from .reader import decode_side

                image = open_image(query, min_side=decode_side(self.backbone.input_size) if box is None else None).image
            except DecodeError as exc:
                what = "the uploaded file" if isinstance(query, (bytes, bytearray)) else query
                raise ArchiveError(f"cannot use {what} as a query: {exc.reason}") from None
        if box is not None:
            try:
                image = media.crop(image, box)
            except (ValueError, TypeError) as exc:
                raise ArchiveError(f"bad region box {box!r}: {exc}") from None
        return image

    def search(self, query, *, layer: str | None = None, k: int = 10, box=None, offset: int = 0,
               folder: str | None = None, date_from: str | None = None, date_to: str | None = None) -> dict:
        """Items most similar to the query, best first; score = cosine similarity of descriptors.

        `folder` keeps items below that folder; `date_from`/`date_to` ('YYYY-MM-DD') filter on the
        capture date, else the file date; `offset` pages through the ranking.
        """
        for label, value in (("k", k), ("offset", offset)):
            if not isinstance(value, (int, np.integer)) or value < (1 if label == "k" else 0):
                raise ArchiveError(f"{label} must be a {'positive' if label == 'k' else 'non-negative'} whole number, got {value!r}")
        name = self._layer(layer)["name"]
        try:
            accept = row_filter(folder, date_from, date_to)
        except ValueError as exc:
            raise ArchiveError(str(exc)) from None
        vector = self.describe(query, name, box)
        by_id = isinstance(query, (int, np.integer))
        exclude = int(query) if by_id and box is None else None
        results, more = nearest(self.store(name), self.catalog, vector, int(k), exclude=exclude, offset=int(offset),
                                accept=accept)
        if by_id:
            q = {"id": int(query), "path": self.item(int(query))["path"]}
        elif isinstance(query, (str, os.PathLike)):
            q = {"id": None, "path": os.path.abspath(os.fspath(query))}
        else:
            q = {"id": None, "path": None}
        if box is not None:
            q["box"] = list(box)
        return {"query": q, "layer": name, "offset": int(offset), "more": more, "results": results}

    def explain(self, query, match: int, *, layer: str | None = None, box=None, mode: str = "centred") -> dict:
        """Why `match` (an id) is similar to the query: heat maps that add up to a score, region pairs,
        and the channels that carried the score with the archive patches that excite them most.

        mode "centred" (default) splits the cosine of the descriptors centred on the archive's mean
        descriptor (what the two share that other images of the archive do not); "cosine" splits the
        raw cosine, the search score. Formulas in index.explain_score; see docs/explain.md.
        """
        from .explain import ExplainError, explain

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

    def items(self, *, offset: int = 0, limit: int = 60, folder: str | None = None) -> dict:
        """A page of indexed items in catalog order, optionally below one folder."""
        return self.catalog.page(offset=offset, limit=limit, folder=folder)

    def folders(self) -> list[dict]:
        return self.catalog.folders()

    def thumbnail(self, item_id: int, size: int = 256) -> bytes:
        return self._image_call(media.thumbnail, item_id, size, self.db / "thumbs")

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

    # --- duplicates -------------------------------------------------------------------------
    def duplicates(self, *, layer: str | None = None, threshold: float | None = None, normalised: bool = True,
                   progress: bool = False, prefer: list[str] | None = None, colour_check: bool = True) -> dict:
        """Exact (content hash) and near (descriptor similarity) duplicate groups; see docs/duplicates.md.
        `prefer`: folders whose members the keeper rule prefers, in order. `colour_check=False` leaves out the
        colour check of near pairs (then recoloured designs group like copies)."""
        from . import duplicates as dup

        try:
            return dup.from_archive(self, layer=layer, threshold=threshold, normalised=normalised, progress=progress,
                                    prefer=prefer, colour_check=colour_check)
        except dup.DuplicatesError as exc:
            raise ArchiveError(str(exc)) from None

    # --- roots ------------------------------------------------------------------------------
    def roots(self) -> list[dict]:
        """The folders (or files) runs were given: [{root, rows, state}] (see index/roots.py)."""
        from .roots import listing

        return listing(self)

    def rename_root(self, old: str, new: str) -> dict:
        """Re-point the rows below a root that moved to where it went; descriptors kept."""
        from .roots import RootError, rename

        try:
            return rename(self, old, new)
        except RootError as exc:
            raise ArchiveError(str(exc)) from None

    def forget_root(self, root: str, *, even_if_present: bool = False) -> dict:
        """Drop the rows below a root and their descriptors (files untouched)."""
        from .roots import RootError, forget

        try:
            return forget(self, root, even_if_present=even_if_present)
        except RootError as exc:
            raise ArchiveError(str(exc)) from None

    def duplicate_plan(self, decisions: dict | None = None, *, text: str | None = None) -> dict:
        """A review plan (index.dup_plan) from the review page's decisions, or from a plan file's text."""
        from . import dup_plan

        try:
            if text is not None:
                return dup_plan.plan_from_file(self, text)
            return dup_plan.plan_from_decisions(self, decisions)
        except dup_plan.PlanError as exc:
            raise ArchiveError(str(exc)) from None

    # --- verification ---------------------------------------------------------------------
    def check(self) -> dict:
        """Verify catalog, stores, manifest and files; read-only. {'ok', 'checked', 'findings'}."""
        from .check import check

        return check(self).as_dict()

    def repair(self, *, progress: bool = True) -> dict:
        """Fix what `check` finds: orphans and temporary files removed, missing descriptors re-embedded."""
        from .check import RepairRefused, repair

        try:
            return repair(self, progress=progress)
        except RepairRefused as exc:
            raise ArchiveError(str(exc)) from None

    # --- reporting --------------------------------------------------------------------------
    def info(self) -> dict:
        summary = self.catalog.summary()
        m = self.manifest
        layers = []
        for l in m["layers"]:
            index = self._index_info(l["name"])
            layers.append({**{k: l[k] for k in ("name", "node", "channels", "stride", "dim")},
                           "vectors": index["vectors"], "hint": PRESET_HINTS.get(l["name"], ""), "index": index,
                           "bytes_per_vector": bytes_per_vector_of(index)})
        return {
            "db": str(self.db),
            "backbone": {k: m["backbone"][k] for k in ("name", "family", "weights_source", "weights_sha256")},
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
        return self.store(layer).describe()  # an archive from before segments, or never checkpointed

    @staticmethod
    def available_layers(backbone: str = DEFAULT_BACKBONE, weights: str | None = None) -> dict:
        """The layers one can index for a backbone, with channels, stride and presets."""
        from .layers import listing

        try:
            b = get_backbone(backbone, weights)
            rows = listing(b, b.build().eval())
        except BackboneError as exc:
            raise ArchiveError(str(exc)) from None
        return {"backbone": b.name, "input_size": b.input_size, "default_layers": list(b.default_layers),
                "default_search_layer": b.default_search_layer, "layers": rows,
                "presets": {name: {"node": node, "hint": PRESET_HINTS[name]} for name, node in b.presets.items()}}

    @staticmethod
    def backbones() -> tuple[str, ...]:
        return NAMES

    def close(self) -> None:
        self.catalog.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
