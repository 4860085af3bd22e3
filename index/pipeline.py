"""The indexing job: read and decode in threads, embed in batches, checkpoint stores then catalog."""
from __future__ import annotations

import hashlib
import os
import sys
from collections import deque
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Callable, Iterable, Iterator

import numpy as np
from tqdm import tqdm

from .decode import DecodeError, open_image
from .embed import Embedder


@dataclass
class Job:
    id: int
    path: str


@dataclass
class RunCounts:
    embedded: int = 0
    failed: int = 0
    interrupted: bool = False


def read_one(job: Job, embedder: Embedder) -> dict:
    """Read, hash, decode and preprocess one file; failures come back as a reason, never raise."""
    try:
        with open(job.path, "rb") as fh:
            data = fh.read()
        st = os.stat(job.path)
    except OSError as exc:
        return {"job": job, "error": f"cannot read file: {exc.strerror or exc}"}
    try:
        decoded = open_image(data, min_side=embedder.size)
        x = embedder.preprocess(decoded.image)
    except DecodeError as exc:
        return {"job": job, "error": exc.reason, "size": st.st_size, "mtime": st.st_mtime}
    except Exception as exc:  # a decoder bug must cost one file, not the night's run
        return {"job": job, "error": f"could not decode: {type(exc).__name__}: {exc}", "size": st.st_size, "mtime": st.st_mtime}
    meta = decoded.metadata
    return {
        "job": job,
        "x": x,
        "row": {
            "id": job.id,
            "sha256": hashlib.sha256(data).hexdigest(),
            "width": decoded.width,
            "height": decoded.height,
            "format": decoded.format,
            "captured_at": meta.get("captured_at"),
            "camera": meta.get("camera"),
            "title": meta.get("title"),
            "keywords": meta.get("keywords") or [],
        },
    }


def bounded_map(fn: Callable, items: Iterable, pool: ThreadPoolExecutor, window: int) -> Iterator:
    """Like pool.map, in order, but with at most `window` items in flight (memory stays flat)."""
    pending: deque[Future] = deque()
    for item in items:
        pending.append(pool.submit(fn, item))
        if len(pending) >= window:
            yield pending.popleft().result()
    while pending:
        yield pending.popleft().result()


def run(
    jobs: list[Job],
    embedder: Embedder,
    on_batch: Callable[[np.ndarray, dict[str, np.ndarray], list[dict], dict[str, tuple]], None],
    on_failures: Callable[[list[dict]], None],
    checkpoint: Callable[[], None],
    *,
    batch_size: int = 16,
    checkpoint_every: int = 512,
    readers: int = 2,
    progress: bool = True,
) -> RunCounts:
    """Embed every job; call on_batch(ids, descriptors, rows, peaks) per batch and checkpoint() regularly."""
    counts = RunCounts()
    bar = tqdm(total=len(jobs), unit="img", disable=not progress, file=sys.stderr, dynamic_ncols=True,
               desc="indexing")
    xs, rows, failures = [], [], []
    since_checkpoint = 0

    def flush() -> None:
        nonlocal xs, rows, since_checkpoint
        if xs:
            descriptors, peaks = embedder.embed_with_peaks(np.stack(xs))
            on_batch(np.array([r["id"] for r in rows], np.int64), descriptors, rows, peaks)
            counts.embedded += len(rows)
            since_checkpoint += len(rows)
            bar.update(len(rows))
            xs, rows = [], []

    pool = ThreadPoolExecutor(max_workers=readers, thread_name_prefix="kinscope-read")
    try:
        for result in bounded_map(lambda j: read_one(j, embedder), jobs, pool, window=batch_size * 3):
            if "error" in result:
                failures.append(result)
                counts.failed += 1
                bar.update(1)
            else:
                xs.append(result["x"])
                rows.append(result["row"])
            if len(xs) >= batch_size:
                flush()
            if since_checkpoint >= checkpoint_every:
                on_failures(failures)
                failures = []
                checkpoint()
                since_checkpoint = 0
        flush()
    except KeyboardInterrupt:
        counts.interrupted = True
        xs, rows = [], []  # the batch in flight is dropped; it stays pending and is redone next time
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
        on_failures(failures)
        checkpoint()
        bar.close()
    return counts
