"""HTML pages: the search page and an item page. Their behaviour is in static/app.js."""
from __future__ import annotations

from datetime import datetime, timezone

from flask import Blueprint, render_template

from index.api import COMBINED_WEIGHTS, ArchiveError

from .archive_access import holder

bp = Blueprint("pages", __name__)


@bp.app_template_filter("timestamp")
def timestamp(value) -> str:
    """A file time (seconds since 1970) as 'YYYY-MM-DD HH:MM UTC' for people."""
    if value is None:
        return "unknown"
    return datetime.fromtimestamp(float(value), timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


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
