"""Request parameters, validated: anything unexpected becomes a 400 with a plain message."""
from __future__ import annotations

import datetime
import re

from flask import request


class BadRequest(Exception):
    status = 400


def integer(name: str, default: int | None = None, lo: int = 0, hi: int = 10**9) -> int | None:
    raw = request.values.get(name)
    if raw is None or raw == "":
        return default
    if not re.fullmatch(r"\d{1,10}", raw):
        raise BadRequest(f"{name} must be a whole number")
    value = int(raw)
    if not lo <= value <= hi:
        raise BadRequest(f"{name} must be between {lo} and {hi}")
    return value


def integers(name: str, most: int = 50) -> list[int]:
    """Every value of a repeated whole-number parameter (name=1&name=2, or name=1,2), at most `most` of them."""
    raw = [v for value in request.values.getlist(name) for v in value.split(",") if v != ""]
    if len(raw) > most:
        raise BadRequest(f"{name} may be given at most {most} times")
    if not all(re.fullmatch(r"\d{1,18}", v) for v in raw):
        raise BadRequest(f"every {name} must be a whole number")
    return [int(v) for v in raw]


def texts(name: str, max_len: int = 200, most: int = 50) -> list[str]:
    """Every non-empty value of a repeated text parameter (name=a&name=b, or name=a,b), at most `most` of them."""
    raw = [v for value in request.values.getlist(name) for v in value.split(",") if v]
    if len(raw) > most:
        raise BadRequest(f"{name} may be given at most {most} times")
    if any(len(v) > max_len or "\x00" in v for v in raw):
        raise BadRequest(f"{name} is too long or holds forbidden characters")
    return raw


def box(name: str = "box") -> list[float] | None:
    raw = request.values.get(name)
    if not raw:
        return None
    try:
        values = [float(v) for v in raw.split(",")]
    except ValueError:
        raise BadRequest(f"{name} must be four fractions x0,y0,x1,y1") from None
    if len(values) != 4 or not (0 <= values[0] < values[2] <= 1 and 0 <= values[1] < values[3] <= 1):
        raise BadRequest(f"{name} must be four fractions 0 <= x0 < x1 <= 1, 0 <= y0 < y1 <= 1")
    return values


def date(name: str) -> str | None:
    raw = request.values.get(name)
    if not raw:
        return None
    if not re.fullmatch(r"\d{4}-\d{2}-\d{2}", raw):
        raise BadRequest(f"{name} must be a date YYYY-MM-DD")
    try:
        datetime.date.fromisoformat(raw)  # a real calendar day: no month 13, no 30 February
    except ValueError:
        raise BadRequest(f"{name} is not a real date: {raw} (YYYY-MM-DD)") from None
    return raw


def text(name: str, max_len: int = 200) -> str | None:
    raw = request.values.get(name)
    if raw is None or raw == "":
        return None
    if len(raw) > max_len or "\x00" in raw:
        raise BadRequest(f"{name} is too long or holds forbidden characters")
    return raw


def layer(names: list[str]) -> str | None:
    raw = text("layer", 100)
    if raw is not None and raw not in names:
        raise BadRequest(f"unknown layer {raw!r}; this archive has: {', '.join(names)}")
    return raw
