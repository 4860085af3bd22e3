"""Progress of long jobs: tqdm's bar redrawn in place on a terminal; plain lines at an interval otherwise.

Written to a file or a pipe (`kinscope index ... > log 2>&1`), a redrawn bar is one long line of carriage-return
frames. There each update becomes a line of its own, at most one every LOG_INTERVAL seconds, plus the last."""
from __future__ import annotations

import re
import sys

LOG_INTERVAL = 15.0  # seconds between progress lines in a log: a few lines a minute
LOG_FORMAT = "{desc}: {n_fmt}/{total_fmt} {unit} ({percentage:.0f}%), {elapsed} elapsed, about {remaining} left"


class _Lines:
    """A file for tqdm that turns its carriage-return frames into whole lines (blank and repeated frames dropped)."""

    def __init__(self, stream):
        self.stream = stream
        self.last = None

    def write(self, text: str) -> None:
        for part in re.split(r"[\r\n]", text):
            line = part.rstrip()
            if line.strip() and line != self.last:  # closing redraws the last state: once is enough
                self.stream.write(line + "\n")
                self.last = line

    def flush(self) -> None:
        self.stream.flush()


def is_terminal(stream) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False


def bar(total: int, desc: str, *, unit: str = "item", enabled: bool = True, leave: bool = True, stream=None):
    """A tqdm bar for `total` steps on `stream` (stderr by default); disabled when not `enabled`."""
    from tqdm import tqdm

    stream = stream if stream is not None else sys.stderr
    if not enabled or is_terminal(stream):
        return tqdm(total=total, desc=desc, unit=unit, disable=not enabled, leave=leave, file=stream,
                    dynamic_ncols=True)
    return tqdm(total=total, desc=desc, unit=unit, file=_Lines(stream), leave=True, mininterval=LOG_INTERVAL,
                maxinterval=LOG_INTERVAL, bar_format=LOG_FORMAT, ascii=True)
