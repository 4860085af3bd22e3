"""The JSON API: everything the page does, for other archive tools too (see /api/openapi.json)."""
from __future__ import annotations

from pathlib import Path

from flask import Blueprint, Response, jsonify, request, url_for

from index.api import COMBINED, COMBINED_WEIGHTS, ArchiveError, DecodeError, item_date

from . import params
from .archive_access import holder

bp = Blueprint("api", __name__, url_prefix="/api")
OPENAPI = Path(__file__).with_name("openapi.json")
UPLOADS = 10  # uploads per search, each run through the network (item ids are read from the stores: 50)


@bp.errorhandler(params.BadRequest)
def _client_error(exc):
    return jsonify(error=str(exc)), exc.status


@bp.errorhandler(ArchiveError)
def _archive_error(exc):
    message = str(exc)
    status = 404 if message.startswith("no indexed item") else 400
    return jsonify(error=message), status


def _summary(row: dict) -> dict:
    keys = ("id", "path", "name", "folder", "width", "height", "size", "mtime", "date", "captured_at", "camera",
            "title", "keywords", "format", "score", "layers")
    out = {k: row[k] for k in keys if k in row}
    if "date" not in out and "mtime" in row:
        out["date"] = item_date(row)  # catalog rows (items, explain's match) get it as search results do
    out["thumbnail"] = url_for("media.thumbnail", item_id=row["id"])
    out["page"] = url_for("pages.item", item_id=row["id"])
    return out


def _query(keep: bool = False):
    """The query named by the request, as Archive takes it: an uploaded file (kept for later requests
    when `keep`), an earlier upload's token, or an item id. Returns (query, upload token or None)."""
    h = holder()
    if "file" in request.files:
        kept = _decode_upload()
        return kept.image(params.box()), h.remember(kept) if keep else None
    token = params.text("upload", 40)
    if token:
        return h.recall(token).image(params.box()), token
    item = params.integer("item")
    if item is not None:
        return item, None
    raise params.BadRequest("give a query: upload a file, or pass upload=TOKEN or item=ID")


def _decode_upload():
    """Content is checked by decoding it (never by its name or declared type); only a reduced copy
    is kept (web.uploads)."""
    data = request.files["file"].read()
    if not data:
        raise params.BadRequest("the uploaded file is empty")
    try:
        return holder().decode(data)
    except DecodeError as exc:
        raise params.BadRequest(f"the uploaded file cannot be used as a query: {exc.reason}") from None


@bp.get("/openapi.json")
def openapi():
    return Response(OPENAPI.read_text(), mimetype="application/json")


@bp.get("/info")
def info():
    h = holder()
    with h.lock:
        h.archive.refresh()
        data = h.archive.info()
    return jsonify(
        images=data["images"], pending=data["pending"], failed=data["failed"], backbone=data["backbone"]["name"],
        default_layer=data["default_layer"], pooling=data["pooling"],
        layers=[{k: l[k] for k in ("name", "node", "channels", "stride", "hint", "vectors")} for l in data["layers"]],
        failures=data["failures"][:200],
    )


@bp.get("/folders")
def folders():
    h = holder()
    with h.lock:
        return jsonify(folders=h.archive.folders())


@bp.get("/items")
def items():
    h = holder()
    offset, limit = params.integer("offset", 0), params.integer("limit", 60, 1, 500)
    with h.lock:
        page = h.archive.items(offset=offset, limit=limit, folder=params.text("folder", 4096),
                               name=params.text("name", 255))
    return jsonify(total=page["total"], offset=page["offset"], items=[_summary(r) for r in page["items"]])


@bp.get("/items/<int:item_id>")
def item(item_id: int):
    h = holder()
    with h.lock:
        row = h.archive.item(item_id)
    out = _summary(row)
    out.update(sha256=row["sha256"], indexed_at=row["indexed_at"], image=url_for("media.image", item_id=item_id))
    return jsonify(out)


@bp.post("/queries")
def upload_query():
    """Keep an uploaded query for later searches, region searches and explanations."""
    if "file" not in request.files:
        raise params.BadRequest("send the image as multipart form field 'file'")
    kept = _decode_upload()
    token = holder().remember(kept)
    return jsonify(upload=token, width=kept.width, height=kept.height,
                   image=url_for("media.upload_image", token=token)), 201


@bp.route("/search", methods=["GET", "POST"])
def search():
    """One example (file, upload=TOKEN or item=ID) as before, or several: upload= and item= repeated, with
    like_item= / unlike_item= / unlike_upload= marks (Rocchio's rule, docs/retrieval.md) and expand=N."""
    h = holder()
    examples, tokens = _examples()
    like = params.integers("like_item")
    unlike = [*params.integers("unlike_item"),
              *(h.recall(t).image() for t in params.texts("unlike_upload", 40, most=UPLOADS))]
    k = params.integer("k", 24, 1, 500)
    offset = params.integer("offset", 0, 0, 100_000)
    expand = params.integer("expand", 0, 0, 50)
    with h.lock:
        h.archive.refresh()
        result = h.archive.search(
            examples[0] if len(examples) == 1 else examples, layer=params.layer(h.archive.layer_names + [COMBINED]),
            k=k, offset=offset, box=params.box(), folder=params.text("folder", 4096), date_from=params.date("date_from"),
            date_to=params.date("date_to"), like=like, unlike=unlike, expand=expand,
        )
    result["query"]["upload"] = tokens[0]  # the first example's (None for an item)
    for q, token in zip(result["query"].get("examples", []), tokens):
        q["upload"] = token
    result["results"] = [_summary(r) for r in result["results"]]
    return jsonify(result)


def _examples():
    """The request's query examples, in order: a posted file, then item=ID, then upload=TOKEN (repeatable;
    the page adds more images to an item query as uploads). The box crops the first. Returns (examples,
    their upload tokens or None)."""
    h = holder()
    files, tokens, items = [], params.texts("upload", 40, most=UPLOADS), params.integers("item")
    if "file" in request.files:
        files = [h.remember(_decode_upload())]
    found = [(h.recall(t), t) for t in files] + [(i, None) for i in items] + [(h.recall(t), t) for t in tokens]
    if not found:
        raise params.BadRequest("give a query: upload a file, or pass upload=TOKEN or item=ID")
    box = params.box()
    examples = [q.image(box if n == 0 else None) if t else q for n, (q, t) in enumerate(found)]
    return examples, [t for _, t in found]


@bp.get("/explain")
def explain():
    h = holder()
    query, token = _query()
    match = params.integer("match")
    if match is None:
        raise params.BadRequest("give match=ID, the result to explain")
    mode = params.text("mode", 20) or "centred"  # Archive.explain refuses modes it does not know (400)
    layer = params.layer(h.archive.layer_names + [COMBINED])
    note = None
    if layer == COMBINED:  # an explanation splits one layer's score: the first layer of the combination
        layer = next((name for name in COMBINED_WEIGHTS if name in h.archive.layer_names), None)
        if layer is None:
            raise params.BadRequest("an explanation is made on one layer at a time: choose a single layer")
        note = (f"The search combined layers ({', '.join(f'{w:g} x {n}' for n, w in COMBINED_WEIGHTS.items())}); "
                f"an explanation splits one layer's score, so this one is on {layer}.")
    with h.lock:
        out = h.archive.explain(query, match, layer=layer, box=params.box(), mode=mode)
        match_row = h.archive.item(match)
    for channel in out["channels"]:
        for e in channel["exemplars"]:
            e["patch"] = url_for("media.patch", item_id=e["id"], box=",".join(f"{v:.4f}" for v in e["box"]))
    out["match"] = _summary({**out["match"], **match_row})
    out["query"] = {"upload": token, "item": query if isinstance(query, int) else None, "box": params.box()}
    if note:
        out["note"] = note
    return jsonify(out)


@bp.app_errorhandler(413)
def too_large(exc):
    from flask import current_app

    limit = current_app.config["MAX_CONTENT_LENGTH"] // (1024 * 1024)
    return jsonify(error=f"the upload is larger than this server accepts ({limit} MB)"), 413


@bp.app_errorhandler(404)
def not_found(exc):
    if request.path.startswith("/api/"):
        return jsonify(error="no such address"), 404
    from .pages import error_page

    return error_page("There is no page at this address.", 404)


@bp.app_errorhandler(405)
def not_allowed(exc):
    return jsonify(error="that method is not allowed here"), 405


@bp.app_errorhandler(500)
def server_error(exc):
    return jsonify(error="something went wrong on the server; the details are in its log"), 500
