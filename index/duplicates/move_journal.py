"""The write-ahead journal of a quarantine run, and the files it must be able to write.

Before a file is renamed into the quarantine, a "moving" record naming both paths is on disk (written
and fdatasync'ed); after the rename, a "moved" record. The journal's space is reserved when it is
created (posix_fallocate), so a full disk cannot stop it from recording a move; a crash, a kill -9 or a
power cut leaves at worst one torn last line, which the reader ignores. `restore` therefore knows of
every file that may have left its place, whatever happened to the run. Names are taken with exclusive
create: two runs never share a manifest or a journal.
"""
from __future__ import annotations

import errno
import json
import os
from datetime import datetime, timezone

RECORD_BYTES = 256  # room per record beyond its two paths, for the reservation


class SpaceError(OSError):
    """The space a run needs could not be reserved."""


def reserve(fd: int, size: int) -> None:
    """Make `size` bytes of the file take real blocks now (zeros), so later writes cannot fail for space."""
    fallocate = getattr(os, "posix_fallocate", None)  # not on macOS
    try:
        if fallocate is None:
            raise OSError(errno.ENOSYS, "no posix_fallocate")
        fallocate(fd, 0, size)
    except OSError as exc:
        if exc.errno not in (errno.EOPNOTSUPP, errno.EINVAL, errno.ENOSYS):
            raise
        os.pwrite(fd, b"\0" * size, 0)  # a file system without fallocate: write the zeros ourselves
        os.fsync(fd)


def fsync_dir(path: str) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def create_exclusive(folder: str, stem: str, suffixes: tuple[str, ...]) -> tuple[str, list[int]]:
    """Create one file per suffix named folder/stem[-n]suffix, all new (O_EXCL); returns the stem used
    and the open descriptors. A name taken by another run moves everything to the next n."""
    for n in range(1, 10_000):
        base = os.path.join(folder, stem if n == 1 else f"{stem}-{n}")
        fds: list[int] = []
        try:
            for suffix in suffixes:
                fds.append(os.open(base + suffix, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644))
            return base, fds
        except OSError as exc:
            for fd, suffix in zip(fds, suffixes):  # only the files this attempt created
                os.close(fd)
                os.unlink(base + suffix)
            if not isinstance(exc, FileExistsError):
                raise
    raise FileExistsError(errno.EEXIST, "no free manifest name", folder)


def timestamp() -> str:
    """UTC time to the microsecond, for names and records (one place, so tests can pin it)."""
    return datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S.%fZ")


class Journal:
    """Append-only JSON lines in a preallocated file; every record is fdatasync'ed before returning."""

    def __init__(self, path: str, fd: int, reserved: int):
        self.path, self.fd, self.reserved, self.offset = path, fd, reserved, 0

    @staticmethod
    def reservation(entries: list[dict]) -> int:
        paths = sum(len(e["original"].encode()) + len(e["quarantined"].encode()) + len(str(e.get("keeper")).encode())
                    for e in entries)  # a "skipped" record's reason may name the keeper
        return 2 * paths + 3 * RECORD_BYTES * (len(entries) + 2) + 4096

    def write(self, record: dict) -> None:
        line = (json.dumps(record, separators=(",", ":")) + "\n").encode()
        os.pwrite(self.fd, line, self.offset)
        getattr(os, "fdatasync", os.fsync)(self.fd)  # fdatasync is not on macOS
        self.offset += len(line)

    def close(self) -> None:
        """Give back the unused reservation and close."""
        try:
            os.ftruncate(self.fd, self.offset)
            os.fsync(self.fd)
        finally:
            os.close(self.fd)


def read_journal(path: str) -> tuple[dict[int, dict], list[str]]:
    """{entry number: its last record} and the problems found (a torn or unreadable line is skipped)."""
    with open(path, "rb") as fh:
        data = fh.read().rstrip(b"\0")
    last: dict[int, dict] = {}
    problems = []
    for lineno, raw in enumerate(data.splitlines(), start=1):
        try:
            record = json.loads(raw)
        except ValueError:
            problems.append(f"journal line {lineno} is unreadable (a write cut short) and was skipped")
            continue
        if isinstance(record, dict) and isinstance(record.get("n"), int) and not isinstance(record["n"], bool):
            last[record["n"]] = record
    return last, problems
