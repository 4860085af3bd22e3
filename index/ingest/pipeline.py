"""The indexing job: decode in worker processes, embed in batches, checkpoint stores then catalog.

Decode workers (index.ingest.decode_pool) read, hash, decode at reduced size and resize each file while the
main thread runs batched inference on what they sent; a bounded number of files is in flight, so
memory stays flat whatever the archive size. The cores are shared out so the two sides do not fight:
the inference engine gets `inference_threads` threads that sleep rather than spin when idle, each
decode worker one thread.
"""
from __future__ import annotations

import os
import resource
import sys
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..common.progress import bar as progress_bar
from ..model.allocator import keep_buffers
from .decode_pool import DecodePool, peak_rss_of


@dataclass
class Job:
    id: int
    path: str


@dataclass
class RunCounts:
    embedded: int = 0
    failed: int = 0
    interrupted: bool = False
    engine: str = ""
    seconds: float = 0.0
    peak_rss: int = 0  # bytes, the indexing process (its lifetime peak: the CLI runs one job)
    peak_rss_workers: int = 0  # bytes, sum over decode workers of each one's peak (an upper bound)
    replaced_workers: int = 0  # decode workers killed on a timeout or lost to a crash


def cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not Linux
        return os.cpu_count() or 1


def configure_threads(inference_threads: int) -> None:
    """Thread pools of the indexing process: torch (if loaded: the torch engine) and FAISS share one
    count; and the allocator told to reuse large buffers (index.model.allocator)."""
    import faiss

    keep_buffers()
    if "torch" in sys.modules:  # an indexer on the cached ONNX model never loads torch
        sys.modules["torch"].set_num_threads(inference_threads)
    faiss.omp_set_num_threads(inference_threads)


def peak_rss_self() -> int:
    """This process's peak resident memory in bytes.

    VmHWM first: ru_maxrss survives exec on Linux, so a process started from a large parent reports
    the parent's size (bench_index's kinscope runs read about 1.65 GB by ru_maxrss, where the same
    command started from a shell peaked at 1.2 GB).
    """
    return peak_rss_of(os.getpid()) or resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # KiB on Linux


def run(
    jobs: list[Job],
    embedder,
    on_batch: Callable[[np.ndarray, dict[str, np.ndarray], list[dict], dict[str, tuple]], None],
    on_failures: Callable[[list[dict]], None],
    checkpoint: Callable[[], None],
    *,
    batch_size: int = 8,
    checkpoint_every: int = 512,
    readers: int | None = None,
    inference_threads: int | None = None,
    file_timeout: float | None = None,
    decode_nice: int = 10,
    checkpoint_share: float = 0.05,
    progress: bool = True,
) -> RunCounts:
    """Embed every job; call on_batch(ids, descriptors, rows, peaks) per batch and checkpoint() regularly.

    readers: decode worker processes (default: one per core). file_timeout: seconds after which a
    file's decode is abandoned and recorded as a failure (default: no limit). Checkpoints come every
    `checkpoint_every` embedded images, spaced out so that saving takes at most `checkpoint_share`
    of the time as the stores grow.
    """
    started = time.monotonic()
    n_cores = cores()
    configure_threads(inference_threads or n_cores)
    counts = RunCounts(engine=embedder.engine.name)
    bar = progress_bar(len(jobs), "indexing", unit="img", enabled=progress)
    pixels, rows, failures = [], [], []
    since_checkpoint = 0
    last_save = {"end": time.monotonic(), "seconds": 0.0}

    def flush() -> None:
        nonlocal pixels, rows, since_checkpoint
        if pixels:
            descriptors, peaks = embedder.embed_pixels(np.stack(pixels))
            on_batch(np.array([r["id"] for r in rows], np.int64), descriptors, rows, peaks)
            counts.embedded += len(rows)
            since_checkpoint += len(rows)
            bar.update(len(rows))
            pixels, rows = [], []

    def save() -> None:
        t = time.monotonic()
        on_failures(failures)
        failures.clear()
        checkpoint()
        last_save["end"] = time.monotonic()
        last_save["seconds"] = last_save["end"] - t

    workers = readers or n_cores
    pool = DecodePool(embedder.size, workers, file_timeout=file_timeout, prefetch=2,
                      in_flight=2 * batch_size + 2 * workers, nice=decode_nice)
    results = pool.map(jobs, path_of=lambda j: j.path)
    try:
        for job, result in results:
            if "error" in result:
                failures.append({"job": job, **result})
                counts.failed += 1
                bar.update(1)
            else:
                pixels.append(result["pixels"])
                rows.append({"id": job.id, **result["row"]})
            if len(pixels) >= batch_size:
                flush()
            spacing = last_save["seconds"] * (1 / checkpoint_share - 1)
            if since_checkpoint >= checkpoint_every and time.monotonic() - last_save["end"] >= spacing:
                save()
                since_checkpoint = 0
        flush()
    except KeyboardInterrupt:
        counts.interrupted = True
        pixels, rows = [], []  # the batch in flight is dropped; it stays pending and is redone next time
    finally:
        results.close()  # stops the dispatcher thread before the workers are told to leave
        pool.close()
        save()
        bar.close()
        counts.seconds = time.monotonic() - started
        counts.peak_rss = peak_rss_self()
        counts.peak_rss_workers = pool.peak_rss()
        counts.replaced_workers = pool.replaced
    return counts
