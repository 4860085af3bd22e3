"""One indexer per database folder: `indexer.lock`, held with flock by whoever writes the stores."""
from __future__ import annotations

import contextlib
import fcntl
from pathlib import Path

from .errors import ArchiveError

LOCK_FILE = "indexer.lock"


@contextlib.contextmanager
def writer_lock(db: Path):
    """Held while indexing, repairing or changing roots; a second writer is refused at once."""
    try:
        fh = open(Path(db) / LOCK_FILE, "a+")
    except OSError as exc:
        raise ArchiveError(f"cannot write to the database folder {db}: {exc.strerror}") from None
    try:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise ArchiveError(f"another kinscope indexer is working on {db}; wait for it to finish") from None
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)
    finally:
        fh.close()


def writer_running(db: Path) -> bool:
    """Whether a writer holds the lock now (a shared lock is tried and given back at once)."""
    try:
        with open(Path(db) / LOCK_FILE, "a+") as fh:
            try:
                fcntl.flock(fh, fcntl.LOCK_SH | fcntl.LOCK_NB)
            except BlockingIOError:
                return True
            fcntl.flock(fh, fcntl.LOCK_UN)
    except OSError:
        return False
    return False
