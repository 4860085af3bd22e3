"""The archive, opened once per app and handed to views; uploaded queries kept in a bounded cache."""
from __future__ import annotations

import secrets
import threading
import time
from collections import OrderedDict

from flask import Flask, current_app

from index.api import Archive, ArchiveError

from .uploads import KeptQuery, keep, release_freed_memory


class Holder:
    """One Archive per app; calls are serialised (one model, one SQLite connection).

    Uploaded queries are kept reduced (web.uploads), at most `cache_size` of them and at most
    `cache_bytes` in all, least recently used first out. Uploads are decoded one at a time, outside
    the archive's lock: a flood of large uploads costs one decode's memory at a time, not one per
    server thread, and searches by archive item go on meanwhile."""

    def __init__(self, db: str, cache_size: int, cache_bytes: int, max_pixels: int):
        self.archive = Archive.open(db)
        self.input_size = int(self.archive.manifest["backbone"]["input_size"])  # read without loading the model
        self.lock = threading.RLock()
        self.decoding = threading.Lock()
        self.queries: OrderedDict[str, KeptQuery] = OrderedDict()
        self.cache_size, self.cache_bytes, self.max_pixels = cache_size, cache_bytes, max_pixels

    def warm(self) -> dict:
        """Load what the first search needs before the server says it is ready: {engine, seconds}, or
        {error, seconds} when it cannot be loaded (the page still serves; searches say why they fail)."""
        start = time.perf_counter()
        with self.lock:
            try:
                return self.archive.warm()
            except ArchiveError as exc:
                return {"error": str(exc), "seconds": time.perf_counter() - start}

    def warm_explanations_later(self) -> threading.Thread:
        """Load torch for explanations in a daemon thread, outside the archive's lock: searches go on
        meanwhile (the query model is ONNX Runtime's), and the first explanation does not wait seconds
        for torch while holding that lock. A failure here only means the first explanation loads it."""
        def run():
            try:
                self.archive.warm_explanations()
            except Exception:  # noqa: BLE001 - reported by the explanation itself, if one is asked for
                pass

        thread = threading.Thread(target=run, name="kinscope-warm-explanations", daemon=True)
        thread.start()
        return thread

    def decode(self, data: bytes) -> KeptQuery:
        """Raises index.api.DecodeError for anything that is not a usable image."""
        with self.decoding:
            try:
                return keep(data, self.max_pixels, self.input_size)
            finally:
                release_freed_memory()

    def kept_bytes(self) -> int:
        with self.lock:
            return sum(q.nbytes for q in self.queries.values())

    def remember(self, query: KeptQuery) -> str:
        token = "q" + secrets.token_hex(8)
        with self.lock:
            self.queries[token] = query
            total = self.kept_bytes()
            while len(self.queries) > 1 and (len(self.queries) > self.cache_size or total > self.cache_bytes):
                total -= self.queries.popitem(last=False)[1].nbytes
        return token

    def recall(self, token: str) -> KeptQuery:
        with self.lock:
            if token not in self.queries:
                raise ArchiveError("that uploaded query is no longer kept; upload the image again")
            self.queries.move_to_end(token)
            return self.queries[token]


def init_app(app: Flask) -> None:
    c = app.config
    app.extensions["kinscope"] = Holder(c["KINSCOPE_DB"], c["QUERY_CACHE"], c["QUERY_CACHE_BYTES"],
                                        c["MAX_UPLOAD_PIXELS"])


def holder() -> Holder:
    return current_app.extensions["kinscope"]
