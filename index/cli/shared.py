"""What the kinscope commands share: the --db option's help, the one-line failure, an archive call."""
from __future__ import annotations

import sys
from typing import Callable

import click

from ..api import Archive, ArchiveError

DB_HELP = "Database folder of the archive (catalog, vector indexes, manifest)."


def fail(message) -> None:
    """One plain line on stderr, exit status 2."""
    click.echo(f"kinscope: {message}", err=True)
    sys.exit(2)


def on_archive(db, call: Callable[[Archive], object], **how):
    """call(archive) on the archive in folder `db` (opened with **how, closed after); an ArchiveError
    ends the command with its one line."""
    try:
        with Archive.open(db, **how) as archive:
            return call(archive)
    except ArchiveError as exc:
        fail(exc)
