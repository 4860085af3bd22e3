"""File sizes for people, one convention everywhere (page, report, command line): decimal SI units with one
decimal, "39.1 kB", "2.4 MB" (1 kB = 1,000 bytes; IEC 80000-13 / SI prefixes: kilo = 10^3, so lower-case k)."""
from __future__ import annotations

UNITS = ("kB", "MB", "GB", "TB")


def size_text(size: int | float | None) -> str:
    """'812 bytes', '39.1 kB', '2.4 MB'; '' for an unknown size. Rounded half up in whole integers (so that
    static/common.js, which does the same, agrees to the byte); never '1000.0 kB': that is '1.0 MB'."""
    if size is None:
        return ""
    size = int(size)
    if size < 1000:
        return f"{size} byte{'' if size == 1 else 's'}"
    for i, unit in enumerate(UNITS):
        step = 1000 ** (i + 1)
        tenths = (size * 10 + step // 2) // step
        if tenths < 10_000 or unit == UNITS[-1]:
            return f"{tenths // 10}.{tenths % 10} {unit}"
    raise AssertionError("unreachable")
