"""Decoding in worker processes: files in, network input pixels and catalog fields out.

Each worker is a plain `python -m index.ingest.decode_pool` process (no torch imported, so it starts in a
fraction of a second and stays small) with a task pipe and a result pipe of its own. A dispatcher
thread in the indexer keeps every worker `prefetch` files ahead and drains the result pipes, so
decoding overlaps the inference that runs in the indexer's main thread. Nothing grows with the
archive: at most `in_flight` files are between "sent to a worker" and "taken by the consumer".

A file whose decode runs longer than `file_timeout` seconds is abandoned: its worker is killed and
replaced, the file comes back as a failure with that reason, and the files queued behind it are sent
again. A worker that dies (a decoder crash) costs only the file it was on, the same way.
"""
from __future__ import annotations

import collections
import importlib
import os
import pickle
import queue
import signal
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from multiprocessing.connection import Connection, wait
from typing import Any, Iterable, Iterator

DEFAULT_READER = "index.ingest.decode_task:read_file"
_DONE = object()


def peak_rss_of(pid: int) -> int:
    """A process's peak resident memory in bytes (VmHWM in /proc; 0 where unavailable)."""
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


@dataclass
class _Worker:
    proc: subprocess.Popen
    tasks: Connection
    results: Connection
    outstanding: collections.deque = field(default_factory=collections.deque)  # (seq, item) in send order
    started: float = 0.0  # when the worker began the file at the head of `outstanding`
    ready: bool = False  # the worker has imported its reader and said so


class DecodePool:
    """`workers` decode processes running `reader(path, size)`; results come back unordered."""

    def __init__(self, size: int, workers: int = 2, *, file_timeout: float | None = None, prefetch: int = 2,
                 in_flight: int = 64, reader: str = DEFAULT_READER, nice: int = 0,
                 extra_path: Iterable[str] = ()):
        if workers < 1:
            raise ValueError("at least one decode worker is needed")
        self.size = size
        self.n_workers = workers
        self.file_timeout = file_timeout
        self.prefetch = max(1, prefetch)
        self.in_flight = max(in_flight, workers * self.prefetch)
        self.reader = reader
        self.nice = nice
        self.extra_path = [str(p) for p in extra_path]
        self.replaced = 0  # workers killed (timeout) or found dead (crash) and started again
        self._peak_rss: dict[int, int] = {}  # slot -> largest peak seen for a process in that slot
        self._workers: list[_Worker] = [self._spawn() for _ in range(workers)]

    # --- processes ----------------------------------------------------------------------
    def _spawn(self) -> _Worker:
        task_r, task_w = os.pipe()
        result_r, result_w = os.pipe()
        env = dict(os.environ)
        # One thread per worker: the cores are shared out by process, not by thread pools inside them.
        env.update({"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"})
        # The worker must import this very `index` package, and any module the reader names.
        package_root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
        paths = self.extra_path + [package_root] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p]
        env["PYTHONPATH"] = os.pathsep.join(paths)
        try:
            proc = subprocess.Popen(
                [sys.executable, "-m", "index.ingest.decode_pool", str(task_r), str(result_w), self.reader,
                 str(self.nice)],
                pass_fds=(task_r, result_w), stdin=subprocess.DEVNULL, env=env, close_fds=True)
        finally:
            os.close(task_r)
            os.close(result_w)
        return _Worker(proc, Connection(task_w, readable=False), Connection(result_r, writable=False))

    def _retire(self, slot: int, kill: bool) -> None:
        w = self._workers[slot]
        self._peak_rss[slot] = max(self._peak_rss.get(slot, 0), peak_rss_of(w.proc.pid))
        if kill and w.proc.poll() is None:
            w.proc.kill()
        for conn in (w.tasks, w.results):
            try:
                conn.close()
            except OSError:
                pass
        try:
            w.proc.wait(timeout=5)
        except subprocess.TimeoutExpired:
            w.proc.kill()
            w.proc.wait()

    def _replace(self, slot: int, kill: bool) -> list:
        """Stop the worker in `slot`, start another; returns the items it still held (head first)."""
        held = [item for _, item in self._workers[slot].outstanding]
        self._retire(slot, kill)
        self._workers[slot] = self._spawn()
        self.replaced += 1
        return held

    def peak_rss(self) -> int:
        """Sum over worker slots of the largest per-process peak resident memory (an upper bound)."""
        total = 0
        for slot, w in enumerate(self._workers):
            total += max(self._peak_rss.get(slot, 0), peak_rss_of(w.proc.pid))
        return total

    def close(self) -> None:
        for w in self._workers:
            try:
                w.tasks.send(None)
            except OSError:
                pass
        deadline = time.monotonic() + 2.0
        for slot, w in enumerate(self._workers):
            self._peak_rss[slot] = max(self._peak_rss.get(slot, 0), peak_rss_of(w.proc.pid))
            try:
                w.proc.wait(timeout=max(0.0, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                pass
            self._retire(slot, kill=True)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # --- work ---------------------------------------------------------------------------
    def map(self, items: Iterable[Any], path_of=lambda item: item) -> Iterator[tuple[Any, dict]]:
        """(item, result) for every item, in completion order; result is reader's dict.

        A file abandoned after `file_timeout` or lost with a crashed worker gives {"error": reason}.
        Stop early by closing the generator (or by an exception in the consumer): the dispatcher ends.
        """
        for slot, w in enumerate(self._workers):
            if w.outstanding:  # left over from a map that was stopped early: its answers are stale
                self._replace(slot, kill=True)
        out: queue.Queue = queue.Queue()
        credit = threading.Semaphore(self.in_flight)
        stop = threading.Event()
        thread = threading.Thread(target=self._dispatch, args=(iter(items), path_of, out, credit, stop),
                                  name="kinscope-decode-dispatch", daemon=True)
        thread.start()
        try:
            while True:
                got = out.get()
                if got is _DONE:
                    return
                if isinstance(got, BaseException):
                    raise got
                credit.release()
                yield got
        finally:
            stop.set()
            thread.join()

    def _dispatch(self, items: Iterator, path_of, out: queue.Queue, credit: threading.Semaphore,
                  stop: threading.Event) -> None:
        try:
            self._dispatch_loop(items, path_of, out, credit, stop)
        except BaseException as exc:  # surfaced in the consumer's thread
            out.put(exc)
        else:
            out.put(_DONE)

    def _dispatch_loop(self, items, path_of, out, credit, stop) -> None:
        retry: collections.deque = collections.deque()  # items to send again after a worker was replaced
        exhausted = False
        seq = 0
        barren = 0  # workers that died before they were ready, in a row
        while not stop.is_set():
            # Keep every worker `prefetch` files ahead, within the in-flight credit.
            for w in self._workers:
                while len(w.outstanding) < self.prefetch and (retry or not exhausted):
                    if retry:  # these still hold the credit taken when they were first sent
                        item = retry.popleft()
                    else:
                        if not credit.acquire(blocking=False):
                            break
                        try:
                            item = next(items)
                        except StopIteration:
                            exhausted = True
                            credit.release()
                            break
                    seq += 1
                    try:
                        w.tasks.send((seq, path_of(item), self.size))
                    except OSError:  # the worker is gone; its result pipe says so below
                        retry.appendleft(item)
                        break
                    if not w.outstanding:
                        w.started = time.monotonic()
                    w.outstanding.append((seq, item))
            busy = [w for w in self._workers if w.outstanding]
            if not busy:
                if exhausted and not retry:
                    return
                time.sleep(0.005)  # no credit left: the consumer is busy with a batch
                continue
            ready = wait([w.results for w in busy], timeout=0.05)
            now = time.monotonic()
            for slot, w in enumerate(self._workers):
                if w.results in ready:
                    try:
                        got_seq, result = w.results.recv()
                    except (EOFError, OSError):
                        code = w.proc.wait()
                        was_ready = w.ready
                        held = self._replace(slot, kill=False)
                        if not was_ready:  # died while starting: no file's fault
                            barren += 1
                            if barren > 3 * self.n_workers:
                                raise RuntimeError(f"decode worker processes cannot start ({_exit_reason(code)}); "
                                                   "see the error printed above") from None
                            retry.extendleft(reversed(held))
                            continue
                        if held:
                            out.put((held[0], {"error": f"the decoder process crashed ({_exit_reason(code)})"}))
                            retry.extendleft(reversed(held[1:]))
                        continue
                    if got_seq == 0:  # the start-up handshake
                        w.ready, w.started = True, now
                        barren = 0
                        continue
                    head_seq, item = w.outstanding.popleft()
                    assert head_seq == got_seq, "a worker answered out of order"
                    w.started = now
                    out.put((item, result))
                elif (self.file_timeout and w.ready and w.outstanding
                      and now - w.started > self.file_timeout):
                    held = self._replace(slot, kill=True)
                    out.put((held[0], {"error": f"decoding took longer than {self.file_timeout:g} s; "
                                                 "the file was abandoned (its decoder process was replaced)"}))
                    retry.extendleft(reversed(held[1:]))


def _exit_reason(code: int) -> str:
    if code < 0:
        try:
            return f"signal {signal.Signals(-code).name}"
        except ValueError:
            return f"signal {-code}"
    return f"exit code {code}"


def _worker_main(task_fd: int, result_fd: int, reader: str, nice: int) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the indexer's to handle; it closes our pipe
    if nice:
        os.nice(nice)
    module, _, name = reader.partition(":")
    fn = getattr(importlib.import_module(module), name)
    tasks = Connection(task_fd, writable=False)
    results = Connection(result_fd, readable=False)
    results.send((0, None))  # ready
    while True:
        try:
            msg = tasks.recv()
        except (EOFError, OSError):
            return
        if msg is None:
            return
        seq, path, size = msg
        try:
            result = fn(path, size)
        except Exception as exc:  # the reader promises not to raise; keep the worker alive if it does
            result = {"error": f"could not decode: {type(exc).__name__}: {exc}"}
        try:
            results.send_bytes(pickle.dumps((seq, result), protocol=pickle.HIGHEST_PROTOCOL))
        except (BrokenPipeError, OSError):
            return


if __name__ == "__main__":
    _worker_main(int(sys.argv[1]), int(sys.argv[2]), sys.argv[3], int(sys.argv[4]))
