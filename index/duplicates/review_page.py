"""A static HTML page for reviewing duplicate groups: one file, thumbnails embedded, no server needed."""
from __future__ import annotations

import base64
import io
import os
from datetime import datetime, timezone
from html import escape

from ..images.decode import DecodeError, open_image

THUMB_SIDE = 180  # longest side of an embedded thumbnail, pixels
THUMB_QUALITY = 70
MAX_GROUPS = 500  # groups shown in one page; the JSON/CSV output always holds all of them

CAUTIONS = (
    "A score is evidence for a person to review, not a verdict: two different pictures of one scene can "
    "score high, and a heavily cropped or edited copy can score low.",
    "Nothing has been deleted: kinscope never deletes files. Moving the non-keepers aside is a separate "
    "step (kinscope duplicates --move-to DIR --apply) that writes a manifest, and kinscope restore "
    "MANIFEST --apply puts every file back.",
)

STYLE = """
body { font: 15px/1.45 system-ui, sans-serif; margin: 0; background: #f6f4ef; color: #222; }
header, main { max-width: 1180px; margin: 0 auto; padding: 0 20px; }
header { padding-top: 18px; }
h1 { font-size: 22px; margin: 8px 0 4px; }
.meta { color: #555; margin: 0 0 10px; }
.caution { background: #fff8e1; border-left: 4px solid #c98a00; padding: 8px 14px; margin: 10px 0; }
.rules { font-size: 13px; color: #444; }
.rules dt { font-weight: 600; margin-top: 6px; }
.rules dd { margin: 0 0 0 14px; }
section.group { background: #fff; border: 1px solid #ddd6c8; border-radius: 6px; margin: 16px 0; padding: 10px 14px; }
section.group h2 { font-size: 16px; margin: 2px 0 8px; }
.kind { display: inline-block; font-size: 12px; padding: 1px 7px; border-radius: 9px; margin-left: 6px; }
.kind.exact { background: #dfe9f5; color: #1d4b7a; }
.kind.near { background: #ece4f3; color: #5a2f78; }
.members { display: flex; flex-wrap: wrap; gap: 12px; }
figure { margin: 0; width: 200px; font-size: 12px; }
figure .frame { width: 200px; height: 190px; display: flex; align-items: center; justify-content: center;
  background: #eeeae2; border: 2px solid transparent; border-radius: 4px; }
figure.keeper .frame { border-color: #2f7a45; }
figure img { max-width: 190px; max-height: 180px; }
figcaption { word-break: break-all; margin-top: 4px; }
.badge { font-weight: 600; color: #2f7a45; }
.unreadable { color: #8a2b2b; padding: 8px; }
details { margin-top: 8px; font-size: 13px; }
table { border-collapse: collapse; }
td, th { padding: 2px 10px 2px 0; text-align: left; }
footer { max-width: 1180px; margin: 20px auto; padding: 0 20px 30px; color: #666; font-size: 12px; }
"""


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


def _when(mtime) -> str:
    if mtime is None:
        return "?"
    return datetime.fromtimestamp(float(mtime), timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def _member(m: dict, keeper: int, kind: str) -> str:
    uri, reason = thumbnail_data_uri(m["path"])
    picture = (f'<img src="{uri}" alt="{escape(os.path.basename(m["path"]))}">' if uri
               else f'<div class="unreadable">cannot be shown: {escape(reason or "")}</div>')
    is_keeper = m["id"] == keeper
    if is_keeper:
        score = "keeper"
    elif kind == "exact":
        score = "identical bytes"
    else:
        score = f"score {m['score']:.3f} (cosine {m['cosine']:.3f})"
    size = f"{m['width']}x{m['height']}" if m.get("width") else "size unknown"
    return (
        f'<figure class="{"keeper" if is_keeper else ""}"><div class="frame">{picture}</div>'
        f'<figcaption>{"<span class=badge>keeper</span><br>" if is_keeper else ""}'
        f'<b>{escape(os.path.basename(m["path"]))}</b><br>{escape(os.path.dirname(m["path"]))}<br>'
        f'{size} px, {(m.get("size") or 0) / 1e6:.2f} MB<br>modified {_when(m.get("mtime"))}<br>'
        f'id {m["id"]} &middot; {escape(score)}</figcaption></figure>'
    )


def _pairs(g: dict) -> str:
    if g["kind"] == "exact":
        return "<p>Every pair is byte-identical (same SHA-256).</p>"
    if not g.get("pairs"):
        return ""
    names = {m["id"]: os.path.basename(m["path"]) for m in g["members"]}
    rows = "".join(
        f"<tr><td>{escape(names[p['a']])}</td><td>{escape(names[p['b']])}</td>"
        f"<td>{p['score']:.3f}</td><td>{p['cosine']:.3f}</td></tr>" for p in g["pairs"])
    return (f"<details><summary>Pairwise scores ({len(g['pairs'])} pairs)</summary><table>"
            f"<tr><th>item</th><th>item</th><th>score</th><th>cosine</th></tr>{rows}</table></details>")


def render(doc: dict, *, max_groups: int = MAX_GROUPS) -> str:
    """The whole page as a string."""
    groups = doc["groups"][:max_groups]
    c = doc["counts"]
    rules = doc["rules"]
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        "<title>kinscope: duplicate groups</title>", f"<style>{STYLE}</style></head><body><header>",
        "<h1>Duplicate groups for review</h1>",
        f"<p class='meta'>Archive {escape(str(doc.get('db') or ''))}; layer {escape(str(doc.get('layer')))}; "
        f"{escape(doc['score'])} score &ge; {doc['threshold']:g}. {c['images']} images compared: "
        f"{c['exact']} exact and {c['near']} near groups holding {c['images_in_groups']} images.</p>",
        *[f"<p class='caution'>{escape(text)}</p>" for text in CAUTIONS],
        "<dl class='rules'>",
        f"<dt>Exact groups</dt><dd>{escape(rules['exact'])}</dd>",
        f"<dt>Near groups</dt><dd>{escape(rules['near'])}</dd>",
        f"<dt>Score</dt><dd>{escape(rules['score'])}</dd>",
        f"<dt>Colour</dt><dd>{escape(rules.get('colour', ''))}</dd>",
        f"<dt>Suggested keeper</dt><dd>{escape(rules['keeper'])} (framed in green)</dd></dl>",
        "</header><main>",
    ]
    if not groups:
        parts.append("<p>No duplicates were found at this threshold.</p>")
    for g in groups:
        keeper = next(m for m in g["members"] if m["id"] == g["keeper"])
        parts.append(
            f"<section class='group' id='group-{g['id']}'><h2>Group {g['id']}<span class='kind {g['kind']}'>"
            f"{g['kind']}</span> &middot; {len(g['members'])} items &middot; keep "
            f"{escape(os.path.basename(keeper['path']))} ({escape(g.get('keeper_reason') or '')})</h2>"
            "<div class='members'>"
            + "".join(_member(m, g["keeper"], g["kind"]) for m in g["members"])
            + "</div>" + _pairs(g) + "</section>")
    if len(doc["groups"]) > max_groups:
        parts.append(f"<p>Only the first {max_groups} of {len(doc['groups'])} groups are shown here; the JSON or "
                     "CSV output lists them all.</p>")
    stamp = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    parts.append(f"</main><footer>Written by kinscope on {stamp}. This page is a static file: it loads nothing "
                 "from the network, and nothing on it changes any file.</footer></body></html>")
    return "\n".join(parts)


def write(doc: dict, path: str | os.PathLike, *, max_groups: int = MAX_GROUPS) -> None:
    from pathlib import Path

    from ..common.files import atomic_write

    atomic_write(Path(path), render(doc, max_groups=max_groups).encode("utf-8"))
