"""The map page (every item placed by visual similarity) and its data: GET /api/map in chunks, and
POST /api/map/paths for exporting a selection. The layout itself is made by `kinscope map`."""
from __future__ import annotations

import numpy as np
from flask import Blueprint, jsonify, render_template, request

from index.api import ArchiveError

from . import params
from .archive_access import holder

bp = Blueprint("map", __name__)
CHUNK_MAX = 100_000  # points per /api/map answer (about 3 MB of JSON)
PATHS_MAX = 100_000  # ids per /api/map/paths request
GRID = 65535  # coordinates are sent as whole numbers 0..GRID across the map's square


@bp.errorhandler(params.BadRequest)
def _bad(exc):
    return jsonify(error=str(exc)), exc.status


@bp.errorhandler(ArchiveError)
def _archive_error(exc):
    return jsonify(error=str(exc)), 400


@bp.get("/map")
def page():
    h = holder()
    with h.lock:
        h.archive.refresh()
        info = h.archive.info()
    return render_template("map.html", info=info)


@bp.get("/api/map")
def chunk():
    h = holder()
    offset = params.integer("offset", 0, 0, 10**9)
    limit = params.integer("limit", CHUNK_MAX, 1, CHUNK_MAX)
    with h.lock:
        h.archive.refresh()
        layer = params.layer(h.archive.layer_names) or h.archive.manifest["default_layer"]
        view = h.archive.map_view(layer)
    if view is None:
        return jsonify(error=f"there is no map of layer {layer} yet: run `kinscope map --db {h.archive.db} --layer {layer}` "
                             "(it lays the archive out once; later runs only place new items)"), 404
    layout = view["layout"]
    total = len(layout.ids)
    part = slice(min(offset, total), min(offset + limit, total))
    xy = np.clip(np.rint(layout.xy[part] * GRID), 0, GRID).astype(np.int64)
    out = {
        "layer": layer,
        "total": total,
        "offset": part.start,
        "count": part.stop - part.start,
        "next": part.stop if part.stop < total else None,
        "generation": layout.meta.get("generation"),
        "grid": GRID,
        "made_at": layout.meta.get("made_at"),
        "method": layout.meta.get("method"),
        "changes": {k: int(view["counts"][k]) for k in ("added", "removed", "unplaced")},
        "items": {
            "id": layout.ids[part].tolist(),
            "x": xy[:, 0].tolist(),
            "y": xy[:, 1].tolist(),
            "folder": view["folder"][part].tolist(),
            "day": view["day"][part].tolist(),
        },
    }
    if part.start == 0:
        out["folders"] = view["folders"]
    return jsonify(out)


@bp.post("/api/map/paths")
def paths():
    """The paths of a selection (sent as JSON {"ids": [...]}), for the page's CSV and JSON downloads."""
    body = request.get_json(silent=True)
    ids = body.get("ids") if isinstance(body, dict) else None
    if not isinstance(ids, list) or not all(isinstance(i, int) and not isinstance(i, bool) for i in ids):
        raise params.BadRequest('send JSON {"ids": [whole numbers]}')
    if len(ids) > PATHS_MAX:
        raise params.BadRequest(f"at most {PATHS_MAX} ids per request")
    if any(not 0 <= i < 2**62 for i in ids):
        raise params.BadRequest("ids are whole numbers from 0")
    h = holder()
    with h.lock:
        rows = h.archive.paths_of(ids)
    return jsonify(items=rows, missing=len(set(ids)) - len(rows))
