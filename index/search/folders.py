"""A folder named by a person (`search --folder`): an absolute path, a path from the current directory, or a
name below the archive's top folder as the page lists its folders ("2024-spring"), made one absolute folder."""
from __future__ import annotations

import os


def archive_top(folders: list[str]) -> str:
    """The folder the page names the others from (web/static/common.js, setRoot): the deepest folder that
    holds every indexed folder, or the parent of the only one."""
    if not folders:
        return ""
    if len(folders) == 1:
        return os.path.dirname(folders[0])
    top = os.path.commonpath(folders)
    return "" if top == os.sep else top


def items_below(folders: list[dict], folder: str) -> int:
    """Indexed items in `folder` or below it, from the catalog's (folder, count) list."""
    start = folder.rstrip(os.sep) + os.sep
    return sum(f["count"] for f in folders if f["folder"] == folder or f["folder"].startswith(start))


def resolve(name: str, folders: list[dict], roots: list[str], cwd: str) -> dict:
    """{folder, items, tried}: the first reading of `name` with indexed items below it (folder None when none
    has any). Readings tried: as given from `cwd`, below the page's top folder, below each indexed root."""
    if os.path.isabs(name):
        readings = [name]
    else:
        top = archive_top([f["folder"] for f in folders])
        readings = [os.path.join(cwd, name)] + ([os.path.join(top, name)] if top else [])
        readings += [os.path.join(root, name) for root in roots]
    tried = list(dict.fromkeys(os.path.normpath(os.path.realpath(r) if os.path.exists(r) else r)
                               for r in readings))
    for folder in tried:
        count = items_below(folders, folder)
        if count:
            return {"folder": folder, "items": count, "tried": tried}
    return {"folder": None, "items": 0, "tried": tried}
