"""`kinscope map`: lay an archive's items out in 2-D by visual similarity, for the page's map view."""
from __future__ import annotations

import json
import time

import click

from .shared import DB_HELP, on_archive


@click.command("map", short_help="Make or update the map of the archive shown on the page.")
@click.option("--db", required=True, type=click.Path(exists=True, file_okay=False), help=DB_HELP)
@click.option("--layer", help="Layer whose descriptors place the items (default: the archive's default layer).")
@click.option("--full", is_flag=True, help="Lay every item out anew instead of placing only the new ones.")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0, 2**31 - 1),
              help="Seed of the layout: the same seed and items give the same map.")
@click.option("--sample", type=click.IntRange(100, 1_000_000),
              help="Items laid out by t-SNE (default 10 000); the others are placed by their nearest neighbours.")
@click.option("-q", "--quiet", is_flag=True, help="No progress lines.")
@click.option("--json", "as_json", is_flag=True, help="Print what was done as JSON.")
def map_cmd(db, layer, full, seed, sample, quiet, as_json):
    """Make or update the map of the archive shown by `kinscope serve` (page "Map of the archive").

    The first run lays every item out (t-SNE of up to --sample items, the rest placed by their nearest
    neighbours). Later runs place items indexed since then by their nearest neighbours and drop removed
    ones; once those placed items exceed a quarter of the map, or with --full, the map is laid out anew."""
    started = time.perf_counter()
    say = None if quiet or as_json else (lambda message: click.echo(f"  {message}", err=True))
    report = on_archive(db, lambda archive: archive.map(layer=layer, seed=seed, full=full, sample=sample,
                                                        progress=say))
    if as_json:
        click.echo(json.dumps(report, indent=2))
        return
    seconds = time.perf_counter() - started
    if report["action"] == "updated":
        click.echo(f"map of layer {report['layer']} updated: {report['added']} new items placed by their neighbours, "
                   f"{report['removed']} removed; {report['items']} items on the map ({seconds:.1f} s)")
    else:
        meta = report["meta"]
        how = (f"{meta['sampled']:,} by t-SNE, the rest placed by their neighbours" if meta["sampled"] < report["items"]
               else "by t-SNE")
        click.echo(f"map of layer {report['layer']} laid out: {report['items']:,} items ({how}; {seconds:.1f} s)")
    click.echo(f"See it with: kinscope serve --db {db}  (page \"Map of the archive\")")
