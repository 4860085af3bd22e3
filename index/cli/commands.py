"""The `kinscope` command: thin wrappers over index.api.Archive (parse, call, print)."""
from __future__ import annotations

import json
import sqlite3
import sys
import time

import click

from ..api import (DEFAULT_BACKBONE, ENGINES, IMAGE_KINDS, NAMES, Archive, ArchiveError, connect_cluster,
                   quiet_pillow_warnings, sqlite_message, type_name)
from .shared import DB_HELP, on_archive
from .shared import fail as _fail



def _cluster(value: str | None):
    """local:N -> a new local Dask cluster of N processes (its client); an address passes through."""
    if not value or not value.startswith("local:"):
        return value
    try:
        return connect_cluster(workers=int(value.split(":", 1)[1]))
    except ValueError:
        _fail(click.UsageError("--cluster local:N takes a number of worker processes"))


def _layers(value: str | None) -> list[str] | None:
    return [v.strip() for v in value.split(",") if v.strip()] if value else None


class _Main(click.Group):
    """Every command: an SQLite error that gets past a command's own handling is one plain line too."""

    def invoke(self, ctx):
        db = _db_argument(list(ctx.args))  # (click empties ctx.args while it runs the command)
        try:
            return super().invoke(ctx)
        except sqlite3.Error as exc:
            _fail(sqlite_message(db, exc))


def _db_argument(args: list[str]) -> str | None:
    for i, arg in enumerate(args):
        if arg == "--db" and i + 1 < len(args):
            return args[i + 1]
        if arg.startswith("--db="):
            return arg[5:]
    return None


@click.group(cls=_Main, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="kinscope")
def main() -> None:
    """Index image archives by the layers of a pretrained network, and search them by example.

    Everything stays on this machine: nothing is uploaded, and kinscope never changes or deletes files
    in the archive (it moves them only for `duplicates --move-to DIR --apply`, and `restore` puts them
    back). A similarity score is evidence for a person to review, not a verdict.
    """
    quiet_pillow_warnings()  # decoders' warnings are recorded with the file, never printed


@main.command("index", short_help="Index the images below folders into a database (only changes).")
@click.argument("paths", nargs=-1, required=True, type=click.Path())
@click.option("--db", required=True, type=click.Path(file_okay=False), help=DB_HELP)
@click.option("--layers", help="Comma-separated layers to keep: presets (colour, texture, parts, objects) or node "
              "names. Default: all four presets. Fixed when the archive is created.")
@click.option("--backbone", type=click.Choice(NAMES), help=f"Network to use (default {DEFAULT_BACKBONE}).")
@click.option("--weights", type=click.Path(exists=True, dir_okay=False),
              help="Weights file (state dict) for the backbone.")
@click.option("--gem-p", type=float, help="GeM pooling exponent (default 3; 1 = average pooling).")
@click.option("--whiten/--no-whiten", default=None, help="Learn PCA whitening once the archive holds 1000 images.")
@click.option("--batch-size", default=8, show_default=True, type=click.IntRange(1, 256),
              help="Images per forward pass (larger batches were no faster on CPU and take more memory).")
@click.option("--engine", type=click.Choice(ENGINES),
              help="Inference engine: auto (default: ONNX Runtime when its one-off export pays off), torch or onnx. "
              "A preference only: descriptors of both are interchangeable.")
@click.option("--workers", type=click.IntRange(1, 64), help="Decode worker processes (default: one per core).")
@click.option("--file-timeout", type=click.FloatRange(0), help="Seconds one file may take to read and decode "
              "before it is recorded as failed (default 120; 0 = no limit).")
@click.option("--cluster", metavar="ADDRESS", help="Send decoding and embedding to a Dask scheduler "
              "(tcp://HOST:8786, or tls://...), or to a new local cluster with local:N (N worker processes).")
@click.option("--checkpoint-every", default=512, show_default=True, type=click.IntRange(1, 100_000),
              help="Save progress after this many images (a crash loses at most this many).")
@click.option("--moved-from", metavar="OLDPATH", help="PATH is where the indexed folder OLDPATH went: its rows are "
              "re-pointed first (nothing is embedded again), then PATH is indexed as usual.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bar.")
@click.option("--json", "as_json", is_flag=True, help="Print the run's counts as JSON.")
def index_cmd(paths, db, layers, backbone, weights, gem_p, whiten, batch_size, engine, workers, file_timeout, cluster,
              checkpoint_every, moved_from, quiet, as_json):
    """Index every image below PATHS into --db; re-running only does what changed."""
    started = time.perf_counter()
    if moved_from and len(paths) != 1:
        _fail(click.UsageError("--moved-from takes exactly one PATH: the folder's new place"))
    new = not Archive.exists(db)
    try:
        if new and not moved_from and not Archive.finds_images(paths):
            _fail(f"no image files found below {', '.join(paths)} (kinscope reads {IMAGE_KINDS}); "
                  f"no database was created")
        if new and not moved_from and not quiet:  # the next half minute is quiet otherwise
            click.echo(f"kinscope: new database {db}: preparing the network (once per model)...", err=True)
        with Archive.open(db, create=not moved_from, backbone=backbone, layers=_layers(layers), gem_p=gem_p,
                          whiten=whiten, weights=weights, engine=engine) as archive:
            if moved_from:
                _print_renamed(archive.rename_root(moved_from, paths[0]), as_json)
            report = archive.add(paths, progress=not quiet, batch_size=batch_size, checkpoint_every=checkpoint_every,
                                 engine=engine, workers=workers, cluster=_cluster(cluster),
                                 file_timeout=file_timeout)
    except ArchiveError as exc:
        _fail(exc)
    except KeyboardInterrupt:  # before the embedding loop (which handles Ctrl-C itself): nothing half-done
        click.echo("Interrupted before any image was embedded. Run the same command again to resume.", err=True)
        sys.exit(130)
    if as_json:
        click.echo(json.dumps(report, indent=2))
        return
    _print_summary(report, db, time.perf_counter() - started)
    found = ("new", "changed", "moved", "removed", "unchanged", "failed", "known_failures")
    if not any(report[key] for key in found):
        click.echo(f"no image files found below {', '.join(paths)} (kinscope reads {IMAGE_KINDS})")
    if report["interrupted"]:
        click.echo("Interrupted: the finished batches are saved. Run the same command again to resume.", err=True)
        sys.exit(130)


def _print_summary(report: dict, db: str, seconds: float) -> None:
    """The counts; the embedding loop's rate beside the whole command's (start-up and scan included)."""
    click.echo(
        f"{report['new']} new, {report['changed']} changed, {report['moved']} moved, {report['removed']} removed, "
        f"{report['unchanged']} unchanged; {report['embedded']} embedded, {report['failed']} could not be read"
        + (f" ({report['known_failures']} known failures not retried)" if report["known_failures"] else "")
    )
    if report.get("engine"):
        loop = report["embedded"] / report["seconds"] if report["seconds"] else 0.0
        whole = report["embedded"] / seconds if seconds else 0.0
        click.echo(f"{loop:.1f} images/s while embedding with {report['engine']} ({report['seconds']:.1f} s); "
                   f"{whole:.1f} images/s for the whole command ({seconds:.1f} s, start-up and scan included)")
        click.echo(f"peak memory {report['peak_rss'] / 2**20:.0f} MB "
                   f"(+ {report['peak_rss_workers'] / 2**20:.0f} MB in decode workers)")
    if report["failed"] or report["known_failures"]:
        click.echo(f"See the reasons with: kinscope info --db {db}")
    _print_notes(report, db)


def _print_renamed(done: dict, as_json: bool) -> None:
    if not as_json:
        kept = (f"; {done['dropped_doubles']} rows already catalogued at the new place kept theirs"
                if done["dropped_doubles"] else "")
        click.echo(f"{done['renamed']} rows re-pointed from {done['old']} to {done['new']} "
                   f"({done['found']} files found there, {done['not_found']} not){kept}")


def _print_notes(report: dict, db: str) -> None:
    """What the run left out, and rows the catalog holds for roots that are gone."""
    links = [s for s in report.get("skipped", []) if "target" in s]
    folders = [s for s in report.get("skipped", []) if "target" not in s]
    if links:
        click.echo(f"not indexed: {len(links)} link{'s' if len(links) != 1 else ''} to files outside the indexed "
                   f"folders (e.g. {links[0]['path']} -> {links[0]['target']}); index the folders they point into to "
                   "include those files")
    for s in folders:
        click.echo(f"left out: {s['path']} ({s['reason']})")
    for root, count in report.get("gone_roots", {}).items():
        click.echo(f"{count} catalogued images are below {root}, which no longer exists: if it moved, run "
                   f"`kinscope roots rename {root} NEWPATH --db {db}`; to drop them, "
                   f"`kinscope roots forget {root} --db {db}`", err=True)


@main.command(short_help="Find the items most like one or several examples.")
@click.argument("images", nargs=-1, type=click.Path(dir_okay=False))
@click.option("--db", required=True, type=click.Path(exists=True, file_okay=False), help=DB_HELP)
@click.option("--id", "item_ids", type=int, multiple=True,
              help="An indexed item as an example (repeat for several; with IMAGES too).")
@click.option("--unlike", "unlike_images", multiple=True, type=click.Path(dir_okay=False),
              help="An image the results should NOT look like (repeatable).")
@click.option("--unlike-id", "unlike_ids", type=int, multiple=True, help="An indexed item as such a counter-example.")
@click.option("--expand", default=0, show_default=True, type=click.IntRange(0, 50),
              help="Query expansion: also search with the N best results (alpha-QE).")
@click.option("--layer", help="Layer to compare on, or 'combined' (several layers' similarities with weights; "
              "default: the archive's default layer).")
@click.option("-k", default=10, show_default=True, type=click.IntRange(1, 10000), help="How many results.")
@click.option("--box", help="Search by a region of the first example only: x0,y0,x1,y1 as fractions (0..1).")
@click.option("--folder", help="Only results below this folder: a path, or a folder as the page lists it (below "
              "the archive's top folder, e.g. 2024-spring).")
@click.option("--json", "as_json", is_flag=True,
              help="Print JSON: {query, layer, results: [{id, path, score, width, height}]}.")
def search(images, db, item_ids, unlike_images, unlike_ids, expand, layer, k, box, folder, as_json):
    """Find the items most like IMAGES (any files) and/or indexed items --id N.

    Several examples and counter-examples (--unlike, --unlike-id) are combined by Rocchio's rule on the
    descriptors (docs/retrieval.md); example items are left out of the results."""
    examples = list(images) + list(item_ids)
    if not examples:
        _fail(click.UsageError("give an IMAGE or --id N (or several)"))
    try:
        region = [float(v) for v in box.split(",")] if box else None
        if region is not None and len(region) != 4:
            raise ValueError
    except ValueError:
        _fail(click.UsageError("--box takes four fractions: x0,y0,x1,y1"))
    query = examples[0] if len(examples) == 1 else examples
    result = on_archive(db, lambda archive: archive.search(query, layer=layer, k=k, box=region,
                                                           folder=_folder(archive, folder),
                                                           unlike=list(unlike_images) + list(unlike_ids),
                                                           expand=expand))
    if as_json:
        keys = ("id", "path", "score", "width", "height")
        result = {key: result[key] for key in ("query", "layer", "weights") if key in result} | {
            "results": [{key: r[key] for key in keys} for r in result["results"]]}
        click.echo(json.dumps(result, indent=2))
        return
    click.echo(f"layer {result['layer']}; score = cosine similarity (1.0 = identical descriptor)"
               if "weights" not in result else
               "layers combined: score = " + " + ".join(f"{w:g} x {n}" for n, w in result["weights"].items())
               + " cosine similarity")
    q = result["query"]
    if "examples" in q:
        rule = q["rule"]
        click.echo(f"{len(q['examples'])} example(s), {len(q['unlike'])} counter-example(s) combined by Rocchio's rule "
                   f"(alpha {rule['alpha']:g}, gamma {rule['gamma']:g}; docs/retrieval.md)")
    if "expand" in q:
        n, power = q["expand"]["n"], q["expand"]["power"]
        click.echo(f"query expanded with the {n} best results (alpha-QE, power {power:g})")
    for rank, r in enumerate(result["results"], 1):
        click.echo(f"{rank:3d}  {r['score']:.4f}  {r['width']}x{r['height']}  id {r['id']:<6d} {r['path']}")


def _folder(archive: Archive, name: str | None) -> str | None:
    """--folder as an absolute folder with indexed items below it; none there ends the command in one line."""
    if not name:
        return None
    found = archive.resolve_folder(name)
    if found["folder"] is None:
        _fail(f"no indexed item lies below the folder {name} (looked in {', '.join(found['tried'])}); give a folder "
              "as the page lists it (below the archive's top folder), or a path")
    return found["folder"]


@main.command(short_help="Counts, layers, network and the files that could not be read.")
@click.option("--db", required=True, type=click.Path(exists=True, file_okay=False), help=DB_HELP)
@click.option("--json", "as_json", is_flag=True, help="Print JSON.")
def info(db, as_json):
    """Counts, layers, backbone and the files that could not be read."""
    data = on_archive(db, lambda archive: archive.info())
    if as_json:
        click.echo(json.dumps(data, indent=2, default=str))
        return
    b = data["backbone"]
    click.echo(f"archive   {data['db']}")
    click.echo(f"backbone  {b['name']} (weights: {b['weights_source']}, sha256 {b['weights_sha256'][:12]})")
    learned = data["whitening"]["learned"]
    click.echo(f"pooling   GeM p={data['pooling']['p']}, L2-normalised"
               + (f"; PCA whitening learned for {', '.join(learned)}" if learned
                  else "; PCA whitening on (learned at 1000 images)" if data["whitening"]["enabled"] else ""))
    click.echo(f"images    {data['images']} indexed ({data['bytes'] / 1e6:.1f} MB), {data['pending']} pending, "
               f"{data['failed']} could not be read")
    click.echo("layers")
    for l in data["layers"]:
        mark = "*" if l["name"] == data["default_layer"] else " "
        click.echo(f"  {mark} {l['name']:<10} {l['node']:<22} {l['channels']:>5} ch  stride {l['stride']:>2}  "
                   f"{l['vectors']} vectors  {l['hint']}")
    click.echo("  (* = default layer for search)")
    kinds = []
    for l in data["layers"]:
        ix = l["index"]
        recall = f", recall@10 {ix['recall_at_10']:.3f}" if "recall_at_10" in ix else ""
        lists = f" (nlist {ix['nlist']}, nprobe {ix['nprobe']}{recall})" if "nlist" in ix else ""
        kinds.append(f"{l['name']} {type_name(ix)}{lists}")
    click.echo(f"indexes   {'; '.join(kinds)}; about {data['index_bytes_per_image']:.0f} bytes per image "
               "in a searching process's memory")
    if data["last_run"]:
        r = data["last_run"]
        click.echo(f"last run  {r['started_at']} -> {r['finished_at'] or '(running)'}: {r['status']}")
    if data["failures"]:
        click.echo("could not be read")
        for f in data["failures"]:
            click.echo(f"  {f['path']}: {f['reason']}")


@main.command(short_help="The layers a network offers, with channels, stride and presets.")
@click.option("--backbone", default=DEFAULT_BACKBONE, show_default=True, type=click.Choice(NAMES),
              help="Network whose layers to list (an archive's own is named by `kinscope info`).")
@click.option("--json", "as_json", is_flag=True, help="Print JSON.")
def layers(backbone, as_json):
    """The layers one can index for a backbone, with channels, spatial stride and presets."""
    try:
        data = Archive.available_layers(backbone)
    except ArchiveError as exc:
        _fail(exc)
    if as_json:
        click.echo(json.dumps(data, indent=2))
        return
    click.echo(f"{data['backbone']} at {data['input_size']}x{data['input_size']} input")
    click.echo(f"  {'node':<22} {'channels':>8} {'stride':>6}  preset")
    for row in data["layers"]:
        preset = f"{row['preset']}: {row['hint']}" if row["preset"] else ""
        click.echo(f"  {row['node']:<22} {row['channels']:>8} {row['stride']:>6}  {preset}")
    click.echo(f"Default layers: {', '.join(data['default_layers'])}; "
               f"search defaults to {data['default_search_layer']}. "
               "Any other node name of the network's graph is accepted too.")


@main.command(short_help="Verify the archive (catalog, vector stores, files); --repair.")
@click.option("--db", required=True, type=click.Path(exists=True, file_okay=False), help=DB_HELP)
@click.option("--repair", is_flag=True,
              help="Fix what can be fixed; re-embed only images whose descriptors are missing.")
@click.option("--json", "as_json", is_flag=True, help="Print JSON.")
def check(db, repair, as_json):
    """Verify the archive: SQLite integrity, catalog against every vector store, manifest, orphans.

    Exits 0 only when everything agrees."""
    try:
        with Archive.open(db, lenient=True) as archive:  # a damaged catalog is reported with the rest
            repaired = archive.repair(progress=not as_json) if repair else None
            report = archive.check()
    except ArchiveError as exc:
        _fail(exc)
    if as_json:
        click.echo(json.dumps({**report, "repaired": repaired}, indent=2))
    else:
        if repaired is not None:
            click.echo("repaired: " + ", ".join(f"{k} {v}" for k, v in repaired.items()))
        for key, value in report["checked"].items():
            click.echo(f"checked   {key}: {value}")
        for f in report["findings"]:
            click.echo(f"{f['severity']:<8}  {f['message']}" + (f" -> {f['fix']}" if f["fix"] else ""))
        click.echo("everything agrees" if report["ok"] else "the archive needs attention (see above)")
    sys.exit(0 if report["ok"] else 1)


@main.command(short_help="Serve the search page to your browser, from this machine.")
@click.option("--db", required=True, type=click.Path(exists=True, file_okay=False), help=DB_HELP)
@click.option("--host", default="127.0.0.1", show_default=True, help="Address to listen on (loopback by default).")
@click.option("--port", default=8470, show_default=True, type=click.IntRange(1, 65535),
              help="Port to listen on; pick another when this one is busy (say, a kinscope already serving).")
@click.option("--token", envvar="KINSCOPE_TOKEN", help="Access token every request must carry; required off loopback "
              "(or set KINSCOPE_TOKEN).")
@click.option("--allow-host", "allow_hosts", multiple=True, metavar="NAME",
              help="Another host name the page may be opened by (repeatable), e.g. a reverse proxy's. "
              "Requests naming any other host are refused.")
def serve(db, host, port, token, allow_hosts):
    """Serve the search page of the archive in --db to a browser, from this machine.

    Open the address it prints (http://127.0.0.1:8470/ by default) to search by an image or an item, see why
    results matched, review duplicates and browse the map. It never changes, moves or deletes your files.
    It runs until Ctrl-C; when the port is busy it says so (pick another with --port)."""
    try:
        from web.serve import (ServeError, answered_names, bind, check_allow_host, check_binding, is_loopback,
                               warm, warm_explanations_later)
    except ImportError:
        _fail("the web page needs Flask and waitress: pip install -e .")
    try:
        check_binding(host, token)
        allow_hosts = tuple(check_allow_host(name) for name in allow_hosts)
        with Archive.open(db):
            pass
        server = bind(db, host, port, token, allow_hosts=allow_hosts)  # listening from here: only now say so
    except (ServeError, ArchiveError) as exc:
        _fail(exc)
    shown = f"[{host}]" if ":" in host else host
    reach = ("Only this machine can reach it. " if is_loopback(host) else
             "Other machines can reach it with the token; over plain HTTP the token and the images travel "
             "unencrypted, so use a private network or an HTTPS proxy in front (see --allow-host). ")
    ready = warm(server)  # the query model loaded and run once: the first search waits for no model
    model = (f"query model ready in {ready['seconds']:.1f} s, {ready['engine']}" if "engine" in ready
             else f"query model not loaded: {ready['error']}")
    click.echo(f"kinscope is serving {db} at http://{shown}:{port}/" + ("?token=..." if token else "")
               + f" ({model})")
    click.echo(f"{reach}It answers to {', '.join(answered_names(host, port, allow_hosts))}. Stop with Ctrl-C.")
    warm_explanations_later(server)
    try:
        server.run()  # until Ctrl-C (waitress handles it and stops its threads)
    finally:
        server.close()


from .duplicates import duplicates_cmd, restore_cmd  # noqa: E402
from .map import map_cmd  # noqa: E402
from .roots import roots_cmd  # noqa: E402

main.add_command(duplicates_cmd)
main.add_command(restore_cmd)
main.add_command(roots_cmd)
main.add_command(map_cmd)


if __name__ == "__main__":
    main()
