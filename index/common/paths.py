"""The one test for "this path is that root, or lies below it".

Paths are compared as the strings given: pass real paths (os.path.realpath) when a link must not
count, as the catalog does (its paths and roots are real paths already). A root's trailing
separator does not matter, and "/a/bc" is not inside "/a/b".
"""
from __future__ import annotations

import os
from typing import Callable, Iterable


def prefix(root: str) -> str:
    """The root with one trailing separator: what every path strictly below it starts with."""
    return root.rstrip(os.sep) + os.sep


def is_inside(path: str, root: str, *, resolve: bool = False) -> bool:
    """`path` is `root` or lies below it; resolve=True compares their real paths (links followed)."""
    if resolve:
        path, root = os.path.realpath(path), os.path.realpath(root)
    return path == root or path.startswith(prefix(root))


def strictly_inside(path: str, root: str) -> bool:
    """`path` lies below `root` and is not `root` itself."""
    return path != root and is_inside(path, root)


def below(roots: Iterable[str]) -> Callable[[str], bool]:
    """is_inside for many roots at once (the prefixes built once): a test to call per path."""
    roots = list(roots)
    exact = set(roots)
    prefixes = tuple(prefix(r) for r in roots)
    return lambda path: path in exact or path.startswith(prefixes)
