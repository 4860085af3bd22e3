"""Images by id only: thumbnails (cached in the database folder), display copies, patches, uploads."""
from __future__ import annotations

from flask import Blueprint, Response, jsonify

from index.api import ArchiveError

from . import params
from .archive_access import holder

bp = Blueprint("media", __name__, url_prefix="/media")


def _jpeg(data: bytes, cache: int = 3600) -> Response:
    response = Response(data, mimetype="image/jpeg")
    response.headers["Cache-Control"] = f"private, max-age={cache}"
    return response


@bp.errorhandler(ArchiveError)
def _archive_error(exc):
    message = str(exc)
    return jsonify(error=message), 404 if message.startswith("no indexed item") else 400


@bp.errorhandler(params.BadRequest)
def _bad(exc):
    return jsonify(error=str(exc)), 400


@bp.get("/items/<int:item_id>/thumbnail")
def thumbnail(item_id: int):
    size = params.integer("size", 256)
    if size not in (128, 256, 512):
        raise params.BadRequest("size must be 128, 256 or 512")
    h = holder()
    with h.lock:
        return _jpeg(h.archive.thumbnail(item_id, size), 86400)


@bp.get("/items/<int:item_id>/image")
def image(item_id: int):
    h = holder()
    with h.lock:
        return _jpeg(h.archive.display_image(item_id))


@bp.get("/items/<int:item_id>/patch")
def patch(item_id: int):
    box = params.box()
    if box is None:
        raise params.BadRequest("give box=x0,y0,x1,y1")
    h = holder()
    with h.lock:
        return _jpeg(h.archive.patch(item_id, box), 86400)


@bp.get("/uploads/<token>")
def upload_image(token: str):
    if not token.isalnum() or len(token) > 40:
        raise params.BadRequest("bad upload token")
    return _jpeg(holder().recall(token).display)
