"""HTML pages: the search page and an item page. Their behaviour is in static/app.js."""
from __future__ import annotations

import re
from datetime import datetime, timezone

from flask import Blueprint, render_template
from markupsafe import Markup, escape

from index.api import COMBINED_WEIGHTS, ArchiveError, size_text

from .archive_access import holder

bp = Blueprint("pages", __name__)


@bp.app_template_filter("timestamp")
def timestamp(value) -> str:
    """A file time (seconds since 1970) as 'YYYY-MM-DD HH:MM UTC' for people."""
    if value is None:
        return "unknown"
    return datetime.fromtimestamp(float(value), timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


@bp.app_template_filter("size")
def size(value) -> str:
    """A file size as the whole page writes it (static/common.js formatSize agrees): '39.1 kB'."""
    return size_text(value)


@bp.app_template_filter("breakable")
def breakable(value) -> Markup:
    """A name or path that may wrap only after "/", "_" or "-" (static/common.js breakable does the same)."""
    text = str(escape(value if value is not None else ""))
    return Markup(re.sub(r"([/_-])", r"\1<wbr>", text))


@bp.app_template_filter("hex_groups")
def hex_groups(value) -> Markup:
    """A long hash that may wrap between groups of 16 digits only (copying it still gives one string)."""
    text = str(escape(value or ""))
    return Markup("<wbr>".join(text[i:i + 16] for i in range(0, len(text), 16)))


def error_page(message: str, status: int):
    return render_template("error.html", message=message), status


@bp.get("/")
def home():
    h = holder()
    with h.lock:
        h.archive.refresh()
        info = h.archive.info()
    names = {l["name"] for l in info["layers"]}
    combined = COMBINED_WEIGHTS if set(COMBINED_WEIGHTS) <= names else None  # the "combined" choice, its weights
    return render_template("search.html", info=info, combined=combined)


@bp.get("/items/<int:item_id>")
def item(item_id: int):
    h = holder()
    try:
        with h.lock:
            row = h.archive.item(item_id)
            info = h.archive.info()
    except ArchiveError as exc:
        return error_page(str(exc), 404)
    return render_template("item.html", item=row, info=info)
