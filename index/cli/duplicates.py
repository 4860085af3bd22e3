"""`kinscope duplicates` and `kinscope restore`: thin wrappers over Archive.duplicates, .quarantine and .restore."""
from __future__ import annotations

import csv
import io
import json
from datetime import datetime, timezone

import click

from ..api import Archive, ArchiveError
from .shared import DB_HELP
from .shared import fail as _fail

CSV_COLUMNS = ("group", "kind", "keeper", "kept_because", "id", "path", "score", "cosine", "width", "height",
               "size", "mtime", "mtime_epoch", "sha256", "exact_group")


def iso_time(epoch) -> str | None:
    """Seconds since 1970 -> ISO 8601 in UTC with its offset (2024-03-05T14:07:09+00:00)."""
    return None if epoch is None else datetime.fromtimestamp(float(epoch), timezone.utc).isoformat(timespec="seconds")


def dated(doc: dict) -> dict:
    """The doc as the command writes it: each member's `mtime` in ISO 8601, the number kept as `mtime_epoch`.
    (Archive.duplicates keeps the number in `mtime`: the HTML report and the review page read it.)"""
    def member(m: dict) -> dict:
        if "mtime" not in m:
            return m
        out = {}
        for key, value in m.items():
            out.update({"mtime": iso_time(value), "mtime_epoch": value} if key == "mtime" else {key: value})
        return out

    return {**doc, "groups": [{**g, "members": [member(m) for m in g["members"]]} for g in doc.get("groups", [])]}


def to_csv(doc: dict) -> str:
    """One row per member, with its group id; `keeper` is 1 for the suggested keeper."""
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=CSV_COLUMNS, lineterminator="\r\n")  # RFC 4180: CRLF
    writer.writeheader()
    for g in doc["groups"]:
        for m in g["members"]:
            is_keeper = m["id"] == g["keeper"]
            writer.writerow({**{k: m.get(k) for k in CSV_COLUMNS if k in m}, "group": g["id"], "kind": g["kind"],
                             "keeper": int(is_keeper), "kept_because": g["keeper_reason"] if is_keeper else ""})
    return buf.getvalue()


def _band(doc: dict) -> str:
    loose = doc.get("loose_threshold")
    return f" (or >= {loose:g} against two members of a group)" if loose is not None else ""


def _summary(doc: dict) -> str:
    c = doc["counts"]
    return (f"{c['groups']} groups ({c['exact']} exact, {c['near']} near) holding {c['images_in_groups']} of "
            f"{c['images']} images; layer {doc['layer']}, {doc['score']} score >= {doc['threshold']:g}"
            f"{_band(doc)}. "
            f"Suggested keeper: {doc['rules']['keeper']}.")


def _plan_summary(doc: dict, path: str) -> str:
    groups = doc["groups"]
    excluded = sum(len(g["excluded"]) for g in groups)
    return (f"Plan {path}: {len(groups)} groups reviewed, {excluded} files marked 'not a copy' (they stay).")


def _print_moves(report: dict, err: bool) -> None:
    files = report["files"]
    if not files:
        click.echo("Nothing to move: no group has a non-keeper.", err=err)
        return
    verb = {"planned": "would move", "moved": "moved", "skipped": "skipped", "not moved": "not moved",
            "moving": "cut short"}
    for f in files:
        line = f"{verb[f['status']]:<10} {f['original']} -> {f['quarantined']}"
        click.echo(line + (f"  ({f['reason']})" if f["reason"] else ""), err=err)
    planned = sum(f["status"] == "planned" for f in files)
    if not report["apply"]:
        click.echo(f"Dry run: nothing was moved ({planned} of {len(files)} files would move). "
                   "Add --apply to move them.", err=err)
    elif report["manifest"]:
        moved = sum(f["status"] == "moved" for f in files)
        click.echo(f"{moved} of {len(files)} files moved; manifest: {report['manifest']}", err=err)
        if report.get("manifest_note"):
            click.echo(f"The manifest's final copy could not be written ({report['manifest_note']}); the journal "
                       "beside it records every move, and restore reads it.", err=err)
        click.echo(f"Undo with: kinscope restore {report['manifest']} --apply", err=err)
    else:
        click.echo("Nothing was moved: no file could be moved safely (reasons above).", err=err)


def _check_writable(path: str) -> None:
    """Refuse an --output file that cannot be written, before anything moves (its contents are kept)."""
    try:
        with open(path, "a", encoding="utf-8"):
            pass
    except OSError as exc:
        _fail(f"cannot write {path}: {exc.strerror or exc}; nothing was moved")


def _refuse_unshown(coverage: dict, report_path: str, apply: bool, apply_unshown: bool) -> None:
    """Files of groups the report leaves out move only when asked for by name (--apply-unshown)."""
    unshown = coverage["unshown_moves"]
    if not unshown:
        return
    groups = len({f["group"] for f in unshown})
    said = (f"the report {report_path} shows {coverage['shown']} of {coverage['groups']} groups, and "
            f"{len(unshown)} of the files to move are only in {groups} group{'s' * (groups != 1)} it does not show")
    if apply and not apply_unshown:
        _fail(f"{said}; nothing was moved. Review them in the JSON or CSV output, then add --apply-unshown to move "
              "them too")
    if not apply:
        click.echo(f"Note: {said}; --apply will refuse them unless you add --apply-unshown.", err=True)


def _explain(ctx, _param, value) -> None:
    if not value or ctx.resilient_parsing:
        return
    click.echo(Archive.threshold_derivation())
    ctx.exit(0)


def _read_text(path: str) -> str:
    try:
        with open(path, encoding="utf-8") as fh:
            return fh.read()
    except (OSError, UnicodeDecodeError) as exc:
        _fail(f"cannot read the plan {path}: {getattr(exc, 'strerror', None) or exc}")


@click.command("duplicates", short_help="Find exact and near duplicate groups; never deletes anything.")
@click.option("--db", required=True, type=click.Path(exists=True, file_okay=False), help=DB_HELP)
@click.option("--layer", help="Layer to compare on (default: objects, the one the benchmark calibrated).")
@click.option("--threshold", type=float, help="Score at or above which two items are near duplicates "
              "(default: the calibrated value of the layer; see docs/duplicates.md). On objects an item may also "
              "join a group where it scores half of it against two members.")
@click.option("--cosine", "raw", is_flag=True, help="Threshold the raw cosine similarity instead of the score "
              "normalised against the archive's background similarity.")
@click.option("--format", "fmt", type=click.Choice(["json", "csv"]), default="json", show_default=True,
              help="JSON (groups with their members, evidence and calibration) or CSV (one row per member).")
@click.option("--output", type=click.Path(dir_okay=False), help="Write the groups to this file instead of stdout.")
@click.option("--report", "report_path", type=click.Path(dir_okay=False),
              help="Also write a static HTML page with thumbnails for review.")
@click.option("--move-to", type=click.Path(file_okay=False),
              help="Quarantine folder (outside every indexed folder) for the non-keepers; a dry run unless --apply.")
@click.option("--apply", is_flag=True, help="With --move-to: really move the files and write the manifest.")
@click.option("--apply-unshown", is_flag=True, help="With --report and --move-to --apply: also move files of "
              "groups the report does not show (it shows at most 500 groups; otherwise that is refused).")
@click.option("--prefer", multiple=True, type=click.Path(file_okay=False),
              help="A folder whose copies the keeper rule prefers (repeatable; the first given wins).")
@click.option("--plan", "plan_path", type=click.Path(exists=True, dir_okay=False),
              help="With --move-to: move what this review plan (JSON or CSV from the /duplicates page) says, "
              "instead of the suggested keepers of a new run.")
@click.option("--explain-threshold", is_flag=True, is_eager=True, expose_value=False, callback=_explain,
              help="Print how the default thresholds were derived (which data, which rule) and exit.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bar and no summary line.")
def duplicates_cmd(db, layer, threshold, raw, fmt, output, report_path, move_to, apply, apply_unshown, prefer,
                   plan_path, quiet):
    """Find exact and near duplicate groups; print them as JSON or CSV. Never deletes anything."""
    if apply and not move_to:
        _fail("--apply only goes with --move-to DIR")
    if plan_path and not move_to:
        _fail("--plan goes with --move-to DIR (add --apply to move the files)")
    if plan_path and report_path:
        _fail("--report goes with a new run, not with --plan (the plan was made on the review page)")
    if apply_unshown and not (report_path and apply):
        _fail("--apply-unshown only goes with --report FILE and --move-to DIR --apply")
    if apply and output:
        _check_writable(output)
    on_stdout = output is None
    stopped = None
    try:
        with Archive.open(db) as archive:
            if plan_path:
                doc = archive.duplicate_plan(text=_read_text(plan_path))
            else:
                doc = archive.duplicates(layer=layer, threshold=threshold, normalised=not raw, progress=not quiet,
                                         prefer=list(prefer))
            if report_path:  # before any move, so the thumbnails come from where the files are now
                try:
                    archive.write_review_page(doc, report_path)
                except OSError as exc:
                    _fail(f"cannot write the report {report_path}: {exc.strerror or exc}")
                if move_to:
                    _refuse_unshown(archive.review_page_coverage(doc), report_path, apply, apply_unshown)
            if move_to:
                try:
                    doc["quarantine"] = archive.quarantine(doc, move_to, apply=apply)
                except ArchiveError as exc:
                    if getattr(exc, "report", None) is None:  # nothing moved: say why and stop
                        raise
                    doc["quarantine"], stopped = exc.report, exc  # stopped after some moves: report them first
    except ArchiveError as exc:
        _fail(exc)
    if move_to:
        _print_moves(doc["quarantine"], err=on_stdout)  # before the output: what moved is said whatever follows
    shown = doc if plan_path else dated(doc)
    if fmt == "json":
        text = json.dumps(shown, indent=2) + "\n"
    else:
        text = Archive.plan_csv(doc) if plan_path else to_csv(shown)
    if on_stdout:
        click.echo(text, nl=False)
    else:
        try:
            with open(output, "w", encoding="utf-8", newline="") as fh:
                fh.write(text)
        except OSError as exc:
            moved = (doc.get("quarantine") or {}).get("manifest")
            _fail(f"cannot write {output}: {exc.strerror or exc}"
                  + (f"; the moves above were made, undo them with: kinscope restore {moved} --apply" if moved else ""))
    if stopped:
        _fail(stopped)
    if not quiet:
        summary = _plan_summary(doc, plan_path) if plan_path else _summary(doc)
        click.echo(summary + (f" Written to {output}." if output else "")
                   + (f" Review page: {report_path}." if report_path else ""), err=on_stdout)


@click.command("restore", short_help="Put files moved aside by `duplicates --move-to` back.")
@click.argument("manifest", type=click.Path(exists=True, dir_okay=False))
@click.option("--apply", is_flag=True, help="Really move the files back (otherwise only print the plan).")
@click.option("--json", "as_json", is_flag=True, help="Print the report as JSON.")
def restore_cmd(manifest, apply, as_json):
    """Put the files listed in a quarantine MANIFEST back where they were; never overwrites."""
    try:
        report = Archive.restore(manifest, apply=apply)
    except ArchiveError as exc:
        _fail(exc)
    if as_json:
        click.echo(json.dumps(report, indent=2))
    else:
        for problem in report["problems"]:
            click.echo(f"note: {problem}")
        for f in report["files"]:
            line = f"{f['status']:<16} {f['quarantined']} -> {f['original']}"
            click.echo(line + (f"  ({f['reason']})" if f["reason"] else ""))
        if not report["files"]:
            click.echo("Nothing to restore: the manifest records no moved file.")
        if not apply:
            click.echo("Dry run: nothing was moved. Add --apply to restore.")
    refused = sum(f["status"] == "refused" for f in report["files"])
    if refused:
        _fail(f"{refused} of {len(report['files'])} files could not be restored (reasons above)")
