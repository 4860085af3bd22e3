"""`kinscope roots list|rename|forget`: the folders an archive's runs were given, and what became of them."""
from __future__ import annotations

import json

import click

from .shared import DB_HELP, on_archive


@click.group("roots", short_help="Indexed folders: list, rename one that moved, forget one.")
def roots_cmd() -> None:
    """The folders indexed into an archive: list them, say where one went, or forget one.

    A folder that was renamed or moved leaves rows that point nowhere (`kinscope check` lists them).
    `rename` re-points them, keeping every descriptor; `forget` drops them. Files are never touched."""


@roots_cmd.command("list", short_help="Every indexed folder with its images, and whether it is still there.")
@click.option("--db", required=True, type=click.Path(exists=True, file_okay=False), help=DB_HELP)
@click.option("--json", "as_json", is_flag=True, help="Print JSON: [{root, rows, state}].")
def list_cmd(db, as_json):
    """Every root with its catalogued images; `gone` = no longer there (or empty)."""
    rows = on_archive(db, lambda archive: archive.roots())
    if as_json:
        click.echo(json.dumps(rows, indent=2))
        return
    for r in rows:
        click.echo(f"{r['rows']:>9}  {r['state']:<8}  {r['root']}")
    if any(r["state"] == "gone" and r["rows"] for r in rows):
        click.echo("Re-point a gone root with `kinscope roots rename OLD NEW --db DB`, or drop its rows with "
                   "`kinscope roots forget OLD --db DB`.")


@roots_cmd.command("rename", short_help="Say that folder OLD is now at NEW (nothing embedded again).")
@click.argument("old")
@click.argument("new", type=click.Path(exists=True))
@click.option("--db", required=True, type=click.Path(exists=True, file_okay=False), help=DB_HELP)
@click.option("--json", "as_json", is_flag=True, help="Print JSON.")
def rename_cmd(old, new, db, as_json):
    """Say that root OLD is now at NEW: its rows are re-pointed, their descriptors kept (nothing is
    embedded again). Run `kinscope index NEW` afterwards to pick up changes made since."""
    done = on_archive(db, lambda archive: archive.rename_root(old, new))
    if as_json:
        click.echo(json.dumps(done, indent=2))
        return
    click.echo(f"{done['renamed']} rows re-pointed from {done['old']} to {done['new']}: {done['found']} files found "
               f"there, {done['not_found']} not")
    if done["dropped_doubles"]:
        click.echo(f"{done['dropped_doubles']} of them were already catalogued at the new place; those rows were kept "
                   "and the old ones dropped")
    if done["not_found"]:
        click.echo(f"Run `kinscope index {done['new']} --db {db}` to bring the rest up to date.")


@roots_cmd.command("forget", short_help="Drop the rows below ROOT and their descriptors (files untouched).")
@click.argument("root")
@click.option("--db", required=True, type=click.Path(exists=True, file_okay=False), help=DB_HELP)
@click.option("--even-if-present", is_flag=True, help="Forget a root that still exists (its descriptors are dropped; "
              "indexing it again embeds every image anew).")
@click.option("--json", "as_json", is_flag=True, help="Print JSON.")
def forget_cmd(root, db, even_if_present, as_json):
    """Drop the rows below ROOT and their descriptors; the files themselves are not touched."""
    done = on_archive(db, lambda archive: archive.forget_root(root, even_if_present=even_if_present))
    if as_json:
        click.echo(json.dumps(done, indent=2))
        return
    click.echo(f"{done['forgotten']} rows below {done['root']} forgotten, with their descriptors")
