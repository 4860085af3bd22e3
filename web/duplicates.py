"""The duplicate review page (/duplicates) and its JSON routes. The page moves nothing: it exports a plan
that `kinscope duplicates --plan FILE --move-to DIR` applies (and `kinscope restore` undoes).

The groups come from Archive.duplicates, computed on the first request and kept until the archive
changes (its manifest generation or item count), per layer and threshold: on an archive of 100 000
images the job takes about half a minute (docs/duplicates.md), later requests are immediate.
"""
from __future__ import annotations

import json
import re
import time

from flask import Blueprint, Response, current_app, jsonify, render_template, request, url_for

from index.api import Archive, ArchiveError, item_date

from . import params
from .archive_access import holder

bp = Blueprint("duplicates", __name__)
KINDS = {"exact": "same bytes", "near": "look-alike"}
CACHE_SIZE = 4


@bp.errorhandler(params.BadRequest)
def _bad(exc):
    return jsonify(error=str(exc)), 400


@bp.errorhandler(ArchiveError)
def _archive_error(exc):
    return jsonify(error=str(exc)), 400


@bp.get("/duplicates")
def page():
    h = holder()
    with h.lock:
        h.archive.refresh()
        info = h.archive.info()
    return render_template("duplicates.html", info=info)


def _threshold() -> float | None:
    raw = params.text("threshold", 20)
    if raw is None:
        return None
    if not re.fullmatch(r"-?\d{1,3}(\.\d{1,6})?", raw):
        raise params.BadRequest("threshold must be a number such as 0.25")
    return float(raw)


def _groups(layer: str | None, threshold: float | None) -> tuple[dict, float]:
    """The duplicate document for these settings, from the app's cache while the archive is unchanged."""
    h = holder()
    cache = current_app.extensions.setdefault("kinscope-duplicates", {})
    with h.lock:
        h.archive.refresh()
        state = (h.archive.manifest.get("generation"), h.archive.info()["images"])
        key = (layer, threshold)
        hit = cache.get(key)
        if hit and hit[0] == state:
            return hit[1], hit[2]
        start = time.perf_counter()
        doc = h.archive.duplicates(layer=layer, threshold=threshold)
        seconds = time.perf_counter() - start
        cache[key] = (state, doc, seconds)
        while len(cache) > CACHE_SIZE:
            cache.pop(next(iter(cache)))
        return doc, seconds


def _member(m: dict) -> dict:
    path = m["path"]
    out = {k: m.get(k) for k in ("id", "path", "score", "cosine", "width", "height", "size", "mtime")}
    out.update(name=path.rsplit("/", 1)[-1], folder=path.rsplit("/", 1)[0], date=item_date(m),
               thumbnail=url_for("media.thumbnail", item_id=m["id"], size=512),
               page=url_for("pages.item", item_id=m["id"]))
    return out


@bp.get("/api/duplicates")
def groups():
    h = holder()
    layer = params.layer(h.archive.layer_names)
    threshold = _threshold()
    offset, limit = params.integer("offset", 0), params.integer("limit", 20, 1, 200)
    doc, seconds = _groups(layer, threshold)
    page_groups = doc["groups"][offset:offset + limit]
    return jsonify(
        layer=doc["layer"], score=doc["score"], threshold=doc["threshold"], loose_threshold=doc.get("loose_threshold"),
        min_cosine=doc["min_cosine"],
        counts=doc["counts"], rules=doc["rules"], calibration=doc.get("calibration"), seconds=round(seconds, 2),
        total=len(doc["groups"]), offset=offset,
        groups=[{"id": g["id"], "kind": g["kind"], "kind_words": KINDS[g["kind"]], "keeper": g["keeper"],
                 "keeper_reason": g["keeper_reason"], "centre": g["centre"],
                 "members": [_member(m) for m in g["members"]]} for g in page_groups],
    )


@bp.post("/api/duplicates/plan")
def plan():
    """The decisions of the page (form field `decisions`, JSON) -> a plan file to download; nothing moves."""
    fmt = request.form.get("format", "json")
    if fmt not in ("json", "csv"):
        raise params.BadRequest("format must be json or csv")
    raw = request.form.get("decisions", "")
    if not raw or len(raw) > 20_000_000:
        raise params.BadRequest("send the decisions as form field 'decisions' (JSON)")
    try:
        decisions = json.loads(raw)
    except ValueError:
        raise params.BadRequest("the decisions are not valid JSON") from None
    h = holder()
    with h.lock:
        plan_doc = h.archive.duplicate_plan(decisions)
    body = json.dumps(plan_doc, indent=2) + "\n" if fmt == "json" else Archive.plan_csv(plan_doc)
    stamp = plan_doc["created_at"].replace(":", "").replace("-", "")
    response = Response(body, mimetype="application/json" if fmt == "json" else "text/csv")
    response.headers["Content-Disposition"] = f'attachment; filename="kinscope-plan-{stamp}.{fmt}"'
    return response
