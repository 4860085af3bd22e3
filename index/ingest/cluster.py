"""The indexing job on a Dask cluster: workers read and embed, the coordinator alone writes.

The coordinator (the process that runs `kinscope index`) keeps sole ownership of the catalog and the
vector stores. It sends chunks of (id, path) to the workers of a Dask scheduler; each worker reads,
decodes and embeds its chunk with the archive's own settings and returns descriptors, peaks, catalog
fields and failures. Results are applied once per chunk, through the same callbacks as the local
pipeline, so checkpoints, reconciliation and failure records work exactly as on one machine. A chunk
lost with a dead worker is recomputed by Dask on another worker; applying a chunk is idempotent
(a store's add replaces an id's vector), so nothing is indexed twice.
"""
from __future__ import annotations

import time
from typing import Callable

import numpy as np

from ..common.progress import bar as progress_bar
from ..model.settings import layer_specs, weights_file
from .pipeline import Job, RunCounts

_WORKER_EMBEDDERS: dict[str, object] = {}  # per worker process: settings key -> Embedder (built once)


def worker_settings(manifest: dict) -> dict:
    """What a worker needs to embed exactly as the archive does (no paths to the database)."""
    b = manifest["backbone"]
    return {
        "backbone": b["name"],
        "weights": weights_file(b),
        "weights_sha256": b["weights_sha256"],
        "layers": layer_specs(manifest),
        "p": manifest["pooling"]["p"],
    }


def _embedder(settings: dict):
    import json

    key = json.dumps(settings, sort_keys=True)
    if key not in _WORKER_EMBEDDERS:
        import torch

        from ..model.backbones import get_backbone
        from ..model.torch_embedder import Embedder
        from ..model.layers import Layer

        torch.set_num_threads(1)  # one task per worker thread; Dask runs as many as the worker has
        backbone = get_backbone(settings["backbone"], settings["weights"])
        if backbone.weights.sha256() != settings["weights_sha256"]:
            raise RuntimeError(f"this worker's weights for {settings['backbone']} differ from the archive's")
        layers = [Layer(**spec) for spec in settings["layers"]]
        _WORKER_EMBEDDERS[key] = Embedder(backbone, backbone.load(), layers, settings["p"], engine="torch")
    return _WORKER_EMBEDDERS[key]


def embed_chunk(settings: dict, chunk: list[tuple[int, str]], path_map: tuple[str, str] | None = None) -> dict:
    """Runs on a worker: read, decode and embed a chunk; failures are returned, never raised."""
    from .decode_task import read_file

    embedder = _embedder(settings)
    pixels, rows, failures = [], [], []
    for image_id, path in chunk:
        local = path_map[1] + path[len(path_map[0]):] if path_map and path.startswith(path_map[0]) else path
        result = read_file(local, embedder.size)
        if "error" in result:
            failures.append({"id": image_id, "path": path, **{k: result.get(k) for k in ("error", "size", "mtime")}})
        else:
            pixels.append(result["pixels"])
            rows.append({"id": image_id, **result["row"]})
    out = {"rows": rows, "failures": failures, "descriptors": {}, "peaks": {}}
    if pixels:
        out["descriptors"], out["peaks"] = embedder.embed_pixels(np.stack(pixels))
    return out


def connect(address: str | None = None, workers: int | None = None):
    """A Dask client: to a running scheduler, or to a new local cluster of `workers` processes."""
    from distributed import Client, LocalCluster

    if address:
        return Client(address, timeout="30s")
    cluster = LocalCluster(n_workers=workers or 2, threads_per_worker=1, processes=True,
                           host="127.0.0.1", dashboard_address=None)
    return Client(cluster)


def run(
    jobs: list[Job],
    settings: dict,
    on_batch: Callable,
    on_failures: Callable[[list[dict]], None],
    checkpoint: Callable[[], None],
    *,
    client,
    chunk_size: int = 32,
    checkpoint_every: int = 512,
    path_map: tuple[str, str] | None = None,
    progress: bool = True,
) -> RunCounts:
    """Embed every job on the cluster's workers; the callbacks run here, on the coordinator."""
    from distributed import as_completed

    started = time.monotonic()
    counts = RunCounts(engine="torch (cluster)")
    bar = progress_bar(len(jobs), "indexing on the cluster", unit="img", enabled=progress)
    chunks = [[(j.id, j.path) for j in jobs[i : i + chunk_size]] for i in range(0, len(jobs), chunk_size)]
    window = max(4, 2 * len(client.scheduler_info().get("workers", {})) + 2)  # bounded: memory stays flat
    since = 0
    todo = iter(chunks)
    futures = as_completed()
    for chunk in (c for _, c in zip(range(window), todo)):
        futures.add(client.submit(embed_chunk, settings, chunk, path_map, pure=False, retries=3))
    try:
        for future in futures:
            result = future.result()
            future.release()
            nxt = next(todo, None)
            if nxt is not None:
                futures.add(client.submit(embed_chunk, settings, nxt, path_map, pure=False, retries=3))
            failures = [{"job": Job(f["id"], f["path"]), "error": f["error"], "size": f["size"], "mtime": f["mtime"]}
                        for f in result["failures"]]
            if result["rows"]:
                ids = np.array([r["id"] for r in result["rows"]], np.int64)
                on_batch(ids, result["descriptors"], result["rows"], result["peaks"])
            on_failures(failures)
            counts.embedded += len(result["rows"])
            counts.failed += len(failures)
            since += len(result["rows"])
            bar.update(len(result["rows"]) + len(failures))
            if since >= checkpoint_every:
                checkpoint()
                since = 0
    except KeyboardInterrupt:
        counts.interrupted = True
    finally:
        for f in list(futures.futures):
            f.cancel()
        checkpoint()
        bar.close()
        counts.seconds = time.monotonic() - started
    return counts
