"""A static HTML page for reviewing duplicate groups: one file, thumbnails embedded, no server needed.

The groups come first; how they were found is a short section at the end. Which file stays and which
would move is taken from the same function the quarantine move uses (quarantine.leaving), so the page
says what `--move-to DIR --apply` would do. Looks: index/duplicates/review_style.py.
"""
from __future__ import annotations

import base64
import io
import os
from datetime import datetime, timezone
from html import escape

from ..images.decode import DecodeError, open_image
from .quarantine import leaving
from .review_style import STYLE
from .review_words import breakable, count, size_text

THUMB_SIDE = 180  # longest side of an embedded thumbnail, pixels
THUMB_QUALITY = 70
MAX_GROUPS = 500  # groups shown in one page; the JSON/CSV output always holds all of them
KIND_WORDS = {"exact": "same bytes", "near": "look-alike"}


def thumbnail_data_uri(path: str, side: int = THUMB_SIDE) -> tuple[str | None, str | None]:
    """(data URI of a small JPEG, None) or (None, reason the file cannot be shown)."""
    try:
        image = open_image(path, min_side=side).image
    except DecodeError as exc:
        return None, exc.reason
    except OSError as exc:
        return None, exc.strerror or str(exc)
    image.thumbnail((side, side))
    buf = io.BytesIO()
    image.convert("RGB").save(buf, "JPEG", quality=THUMB_QUALITY)
    return "data:image/jpeg;base64," + base64.b64encode(buf.getvalue()).decode("ascii"), None


def shown_groups(doc: dict, max_groups: int | None = None) -> list[dict]:
    return doc["groups"][: MAX_GROUPS if max_groups is None else max_groups]


def unshown_moves(doc: dict, max_groups: int | None = None) -> list[dict]:
    """The files a quarantine move of `doc` would move that the page does not show as "would move"
    (they are only in groups past the page's limit)."""
    shown = {m["path"] for g in shown_groups(doc, max_groups) for m in g["members"]}
    return [f for f in leaving(doc) if f["path"] not in shown]


def _when(mtime) -> str:
    if mtime is None:
        return "unknown"
    return datetime.fromtimestamp(float(mtime), timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def _decision(g: dict, m: dict, moving: dict, keeper_ok: bool) -> tuple[str, str]:
    """(css class, the words on the card as HTML) for one member; `moving` maps each path that would move
    to (the path that stays for it, the id of the look-alike group that keeps that file, if any)."""
    if m["path"] in moving:
        stays_for, in_group = moving[m["path"]]
        if m["id"] == g["keeper"]:  # an exact group's keeper that a look-alike group's keeper replaces
            return "moves", (f"would move: {breakable(os.path.basename(stays_for))} stays for it "
                             f"(group {in_group}, look-alike)")
        return ("moves", "would move") if keeper_ok else ("left", "left in place: no file here can stay")
    if m["id"] == g["keeper"]:
        return "stays", escape(f"stays: {g.get('keeper_reason') or 'the rule chose it'}")
    return "stays", "stays: it is the file that stays in another group"


def _facts(g: dict, m: dict, css: str) -> str:
    if css == "stays" and m["id"] == g["keeper"]:
        score = "the file the others are scored against"
    elif g["kind"] == "exact":
        score = "same bytes as every file here"
    else:
        score = f"{m['score']:.3f} (cosine {m['cosine']:.3f})"
    pixels = f"{m['width']:,} \u00d7 {m['height']:,}" if m.get("width") else "unknown"
    rows = (("score", score), ("pixels", pixels), ("file", size_text(m.get("size"))),
            ("modified", _when(m.get("mtime"))), ("id", str(m["id"])))
    return "<dl class='facts'>" + "".join(f"<dt>{k}</dt><dd>{escape(v)}</dd>" for k, v in rows) + "</dl>"


def _member(g: dict, m: dict, moving: dict, keeper_ok: bool) -> str:
    css, words = _decision(g, m, moving, keeper_ok)
    name = os.path.basename(m["path"])
    uri, reason = thumbnail_data_uri(m["path"])
    picture = (f'<img src="{uri}" alt="{escape(name)}">' if uri
               else f'<span class="unreadable">cannot be shown: {escape(reason or "")}</span>')
    text = (f"<p class='name'>{breakable(name)}</p><p class='folder'>{breakable(os.path.dirname(m['path']))}</p>"
            + _facts(g, m, css))
    if css == "stays":
        text = f"<div>{text}</div>"
    return (f"<li class='file {css}'><p class='decision'>{words}</p>"
            f"<div class='thumb'>{picture}</div>{text}</li>")


def _pairs(g: dict) -> str:
    if g["kind"] == "exact":
        return "<p class='summary'>Every file here has the same SHA-256 content hash: the bytes are identical.</p>"
    if not g.get("pairs"):
        return ""
    names = {m["id"]: breakable(os.path.basename(m["path"])) for m in g["members"]}
    rows = "".join(f"<tr><td>{names[p['a']]}</td><td>{names[p['b']]}</td><td>{p['score']:.3f}</td>"
                   f"<td>{p['cosine']:.3f}</td></tr>" for p in g["pairs"])
    return (f"<details><summary>Scores of every pair ({count(len(g['pairs']), 'pair')})</summary><table>"
            f"<tr><th>file</th><th>file</th><th>score</th><th>cosine</th></tr>{rows}</table></details>")


def _group(g: dict, moving: dict) -> str:
    keeper = next(m for m in g["members"] if m["id"] == g["keeper"])
    keeper_ok = (keeper.get("evidence") or {}).get("eligible", True)
    n_moving = sum(m["path"] in moving for m in g["members"])
    tally = f"{count(len(g['members']), 'file')}, {n_moving} would move" if keeper_ok else "nothing here moves"
    return (f"<section class='group' id='group-{g['id']}'><h2>Group {g['id']} <span class='kind'>&middot; "
            f"{KIND_WORDS.get(g['kind'], escape(g['kind']))} &middot; {tally}</span></h2><ol class='files'>"
            + "".join(_member(g, m, moving, keeper_ok) for m in g["members"]) + "</ol>" + _pairs(g) + "</section>")


def _summary(doc: dict, moving: dict) -> str:
    c = doc["counts"]
    found = (f"{count(c['groups'], 'group')} holding {c['images_in_groups']:,} of {count(c['images'], 'image')}: "
             f"{count(c['exact'], 'group')} of files with the same bytes and {count(c['near'], 'group')} of look-alikes"
             if c["groups"] else f"No duplicates among {count(c['images'], 'image')}")
    loose = doc.get("loose_threshold")
    band = f" (or {loose:g} or more against two members of a group)" if loose is not None else ""
    return (f"<p class='summary'>{found}. Compared on layer {escape(str(doc.get('layer')))}, "
            f"{escape(doc['score'])} score {doc['threshold']:g} or more{band}; archive "
            f"{escape(str(doc.get('db') or ''))}. If you move them aside, {count(len(moving), 'file')} would move "
            "(marked \u201cwould move\u201d below).</p>")


def _notes(doc: dict, shown: int) -> str:
    notes = [
        "Nothing has been moved or deleted, and kinscope never deletes a file. <code>kinscope duplicates "
        "--move-to DIR --apply</code> moves the files marked \u201cwould move\u201d into DIR and writes a manifest; "
        "keep it: <code>kinscope restore MANIFEST --apply</code> needs it to put them back.",
        "A score is evidence for you to review, not a verdict: different pictures of one scene can score high, "
        "a heavily edited copy low. Check each file that stays: the rule can pick a derivative, such as an "
        "upscaled copy, over the original.",
        "This page holds thumbnails and full paths from your archive: keep it as private as the archive.",
    ]
    total = len(doc["groups"])
    if total > shown:
        notes.insert(0, f"<span class='more'>This page shows the first {shown:,} of {total:,} groups.</span> The "
                     "JSON or CSV output lists them all; <code>--report</code> with <code>--apply</code> refuses to "
                     "move files of groups not shown here unless you add <code>--apply-unshown</code>.")
    return "<ul class='notes'>" + "".join(f"<li>{n}</li>" for n in notes) + "</ul>"


def _method(doc: dict) -> str:
    rules = doc["rules"]
    score = ("The cosine similarity less what the two files' backgrounds (how alike each looks to unrelated "
             "images of this archive) account for" if doc["score"] == "normalised"
             else "The cosine similarity of the two descriptors")
    short = (
        ("Same bytes", "Files with the same SHA-256 content hash."),
        ("Look-alikes", f"The network's descriptors on layer {doc.get('layer')} are compared; each file of a group "
         f"scores {doc['threshold']:g} or more against the group's centre or against two of its files"
         + (f", or {doc['loose_threshold']:g} or more against two of its files" if doc.get("loose_threshold") else "")
         + "."),
        ("Score", score + "."),
        ("Colour", "Two look-alikes must also share their colours: another colourway of a design is not a copy "
         "(a grey proof still is)." if str(rules.get("colour", "")).lower() != "colour check: off"
         else "Not checked: recoloured designs group like copies."),
        ("File that stays", "Suggested by a rule, not known: never a missing, changed or linked file; then folders "
         "given with --prefer; then the largest resolution that is not upscaled, the lightest compression and "
         "further steps."),
    )
    full = (("Same bytes", rules.get("exact")), ("Look-alikes", rules.get("near")), ("Score", rules.get("score")),
            ("Colour", rules.get("colour")), ("File that stays", rules.get("keeper")))
    dl = lambda pairs: "<dl>" + "".join(f"<dt>{k}</dt><dd>{escape(v)}</dd>" for k, v in pairs if v) + "</dl>"  # noqa
    return ("<section class='method'><h2>How these were found</h2>" + dl(short)
            + "<details><summary>The rules in full</summary>" + dl(full) + "</details></section>")


def render(doc: dict, *, max_groups: int | None = None) -> str:
    """The whole page as a string."""
    groups = shown_groups(doc, max_groups)
    kept_by = {m["path"]: g["id"] for g in doc["groups"] if g["kind"] == "near"
               for m in g["members"] if m["id"] == g["keeper"]}
    moving = {f["path"]: (f["keeper_path"], kept_by.get(f["keeper_path"])) for f in leaving(doc)}
    stamp = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        "<title>kinscope: duplicate groups to review</title>", f"<style>{STYLE}</style></head><body><header>",
        "<h1>Duplicate groups to review</h1>", _summary(doc, moving), _notes(doc, len(groups)), "</header><main>",
        *[_group(g, moving) for g in groups],
        _method(doc),
        f"</main><footer>Written by kinscope on {stamp}. A static file: it loads nothing from the network and "
        "nothing on it changes a file.</footer></body></html>",
    ]
    return "\n".join(parts)


def write(doc: dict, path: str | os.PathLike, *, max_groups: int | None = None) -> None:
    from pathlib import Path

    from ..common.files import atomic_write

    atomic_write(Path(path), render(doc, max_groups=max_groups).encode("utf-8"))
