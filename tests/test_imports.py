"""The shape of the engine package: imports flow one way between its rooms, without circles.

The graph is read from the source (ast), never by importing: an edge A -> B for every `import B` and
`from B import x` in A, at any depth (function-level imports count too); `from P import x` where
P.x is a module is an edge to P.x, otherwise to P itself (for a package, its __init__). Importing a
package's submodule is not an edge to the package's __init__: Python has it half-built already.
"""
from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
MAX_LINES = 500
MAX_WIDTH = 120  # characters a line, across index/
# Rooms of index/ and what each may import (besides itself), in the one direction data flows:
# common < {db, images, vectors} < model < search < ingest < {duplicates, map} < api < cli.
ALLOWED = {
    "common": set(),
    "db": {"common"},
    "images": {"common"},
    "vectors": {"common"},
    "model": {"common", "db", "images"},  # db: a new archive's manifest is made in model/settings.py
    "search": {"common", "db", "images", "vectors", "model"},
    "ingest": {"common", "db", "images", "vectors", "model", "search"},
    "duplicates": {"common", "db", "images", "vectors"},
    "map": {"common", "db", "vectors"},
    "api": {"common", "db", "images", "vectors", "model", "search", "ingest", "duplicates", "map"},
    "cli": {"api"},
    "__main__": {"cli"},
    "": set(),  # index/__init__.py: the version only (every room may read it)
}
# What web/ may import from index.
WEB_ALLOWED = {"index.api", "index.common.errors"}


def module_files(package: Path, prefix: str) -> dict[str, Path]:
    """Module name -> file, for every .py below `package` (a package's name maps to its __init__)."""
    out = {}
    for path in sorted(package.rglob("*.py")):
        parts = list(path.relative_to(package).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join([prefix, *parts])] = path
    return out


def imports_of(name: str, path: Path, known: set[str]) -> set[str]:
    """The modules (among `known`, plus outside ones by name) that module `name` imports."""
    is_package = path.name == "__init__.py"
    package = name if is_package else name.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                source = ".".join(base + ([node.module] if node.module else []))
            else:
                source = node.module
            for alias in node.names:
                sub = f"{source}.{alias.name}"
                found.add(sub if sub in known else source)
    return found - {name}


def graph(packages: dict[str, Path]) -> dict[str, set[str]]:
    files = {}
    for prefix, folder in packages.items():
        files.update(module_files(folder, prefix))
    known = set(files)
    return {name: imports_of(name, path, known) for name, path in files.items()}


def find_cycle(edges: dict[str, set[str]]) -> list[str] | None:
    """One import circle as [a, b, ..., a], or None (depth-first search, iterative)."""
    state: dict[str, int] = {}  # 1: on the current path, 2: done
    for start in sorted(edges):
        if state.get(start):
            continue
        path, stack = [start], [iter(sorted(edges[start]))]
        state[start] = 1
        while stack:
            nxt = next(stack[-1], None)
            if nxt is None:
                state[path.pop()] = 2
                stack.pop()
            elif nxt in edges and state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            elif nxt in edges and not state.get(nxt):
                state[nxt] = 1
                path.append(nxt)
                stack.append(iter(sorted(edges[nxt])))
    return None


def room(name: str) -> str | None:
    """index.db.catalog -> "db"; index.api -> "api"; index -> ""; None outside index."""
    parts = name.split(".")
    if parts[0] != "index":
        return None
    return parts[1] if len(parts) > 1 else ""


def room_breaches(edges: dict[str, set[str]]) -> set[str]:
    out = set()
    for source, targets in edges.items():
        own = room(source)
        if own is None:
            continue
        if own not in ALLOWED:
            out.add(f"{source} is in no room: put it in the one its job belongs to")
            continue
        for target in targets:
            other = room(target)
            if other not in (None, "", own) and other not in ALLOWED[own]:  # "": index/__init__, the version
                out.add(f"{source} -> {target}")
    return out


def whole_graph() -> dict[str, set[str]]:
    """index/ and web/."""
    return graph({"index": ROOT / "index", "web": ROOT / "web"})


def test_no_import_circles():
    cycle = find_cycle(whole_graph())
    assert cycle is None, "import circle: " + " -> ".join(cycle)


def test_rooms_import_only_rooms_before_them():
    breaches = room_breaches(whole_graph())
    assert not breaches, "imports against the order of the rooms:\n  " + "\n  ".join(sorted(breaches))


def test_web_calls_the_engine_through_the_facade_only():
    breaches = {f"{s} -> {t}" for s, ts in whole_graph().items() if s.startswith("web.") or s == "web"
                for t in ts if room(t) is not None and t not in WEB_ALLOWED}
    assert not breaches, "web/ past index.api:\n  " + "\n  ".join(sorted(breaches))


def long_modules() -> list[str]:
    out = []
    for name, path in module_files(ROOT / "index", "index").items():
        n = len(path.read_text().splitlines())
        if n > MAX_LINES:
            out.append(f"{name}: {n} lines")
    return out


def test_one_line_width_across_the_package():
    wide = [f"{p.relative_to(ROOT)}:{n}" for p in sorted((ROOT / "index").rglob("*.py"))
            for n, line in enumerate(p.read_text().splitlines(), 1) if len(line) > MAX_WIDTH]
    assert not wide, f"lines over {MAX_WIDTH} characters: {wide}"


def test_no_module_is_over_the_line_limit():
    long = long_modules()
    assert not long, f"modules over {MAX_LINES} lines: {long}"


def test_the_checks_catch_what_they_are_for(tmp_path):
    """The checker on a package made here: a circle through an __init__ that a submodule imports back
    from, a room importing against the order, and a clean variant."""
    pkg = tmp_path / "index"
    (pkg / "model" / "backbones").mkdir(parents=True)
    (pkg / "db").mkdir()
    (pkg / "__init__.py").write_text("")
    (pkg / "model" / "__init__.py").write_text("")
    (pkg / "db" / "__init__.py").write_text("")
    (pkg / "model" / "backbones" / "__init__.py").write_text("NAMES = ()\n\ndef get():\n    from .lite import x\n")
    (pkg / "model" / "backbones" / "lite.py").write_text("from . import NAMES\nx = 1\n")
    (pkg / "db" / "catalog.py").write_text("from ..model.backbones import lite\n")
    edges = graph({"index": pkg})
    assert edges["index.db.catalog"] == {"index.model.backbones.lite"}
    cycle = find_cycle(edges)
    assert cycle[0] == cycle[-1] and set(cycle) == {"index.model.backbones", "index.model.backbones.lite"}
    assert room_breaches(edges) == {"index.db.catalog -> index.model.backbones.lite"}
    (pkg / "model" / "backbones" / "lite.py").write_text("from .names import NAMES\nx = 1\n")
    (pkg / "model" / "backbones" / "names.py").write_text("NAMES = ()\n")
    (pkg / "db" / "catalog.py").write_text("import os\n")
    edges = graph({"index": pkg})
    assert find_cycle(edges) is None and room_breaches(edges) == set()
