"""The archive, opened once per app and handed to views; uploaded queries kept in a small cache."""
from __future__ import annotations

import secrets
import threading
from collections import OrderedDict

from flask import Flask, current_app
from PIL import Image

from index.api import Archive, ArchiveError


class Holder:
    """One Archive per app; calls are serialised (one model, one SQLite connection)."""

    def __init__(self, db: str, cache_size: int):
        self.archive = Archive.open(db)
        self.lock = threading.RLock()
        self.queries: OrderedDict[str, Image.Image] = OrderedDict()
        self.cache_size = cache_size

    def remember(self, image: Image.Image) -> str:
        token = "q" + secrets.token_hex(8)
        with self.lock:
            self.queries[token] = image
            while len(self.queries) > self.cache_size:
                self.queries.popitem(last=False)
        return token

    def recall(self, token: str) -> Image.Image:
        with self.lock:
            if token not in self.queries:
                raise ArchiveError("that uploaded query is no longer kept; upload the image again")
            self.queries.move_to_end(token)
            return self.queries[token]


def init_app(app: Flask) -> None:
    app.extensions["kinscope"] = Holder(app.config["KINSCOPE_DB"], app.config["QUERY_CACHE"])


def holder() -> Holder:
    return current_app.extensions["kinscope"]
