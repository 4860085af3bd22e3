"""Review plans: a person's decisions on duplicate groups, written by the review page, read by
`kinscope duplicates --plan FILE --move-to DIR`.

A plan is the document the quarantine takes (index.duplicates.quarantine.move): groups with a keeper and members,
plus, per group, the members a person marked "not a copy" (`excluded`; they never move). It is checked
against the catalog when it is built and again when it is read: every id must be an indexed item and
every path and content hash must still be the catalog's, so an edited or stale plan cannot name a file
the archive does not hold. JSON (`kinscope-plan/1`) or CSV (one row per file, `decision` = stays,
moves or not a copy).
"""
from __future__ import annotations

import csv
import io
import json
from datetime import datetime, timezone

PLAN_FORMAT = "kinscope-plan/1"
CSV_COLUMNS = ("group", "kind", "decision", "id", "path", "size", "sha256", "keeper_reason")
DECISIONS = {"stays": "keeper", "moves": "member", "not a copy": "excluded"}
CHOSEN = "chosen on the review page"
MAX_GROUPS = 100_000


class PlanError(ValueError):
    """A plan that cannot be used as it is; nothing has been moved."""


def _ids(value, what: str) -> list[int]:
    if not isinstance(value, list) or not all(isinstance(v, int) and not isinstance(v, bool) for v in value):
        raise PlanError(f"{what} must be a list of item ids")
    if len(set(value)) != len(value):
        raise PlanError(f"{what} names an item twice")
    return value


def _group_id(value) -> str:
    if not isinstance(value, (str, int)) or isinstance(value, bool) or not str(value) or len(str(value)) > 40:
        raise PlanError("each group needs an id (a number or a short text)")
    return str(value)


def decisions_of(data) -> list[dict]:
    """The groups of a decisions document ({groups: [{id, kind, keeper, members, excluded}]}), checked for shape."""
    if not isinstance(data, dict) or not isinstance(data.get("groups"), list):
        raise PlanError("the plan must be an object with a list of groups")
    if len(data["groups"]) > MAX_GROUPS:
        raise PlanError(f"a plan holds at most {MAX_GROUPS} groups")
    out = []
    for g in data["groups"]:
        if not isinstance(g, dict):
            raise PlanError("each group must be an object")
        gid = _group_id(g.get("id"))
        members = _ids(g.get("members"), f"group {gid}: members")
        excluded = _ids(g.get("excluded", []), f"group {gid}: excluded")
        keeper = g.get("keeper")
        if keeper not in members:
            raise PlanError(f"group {gid}: the keeper must be one of its members")
        if set(members) & set(excluded):
            raise PlanError(f"group {gid}: an item cannot be both a member and 'not a copy'")
        kind = g.get("kind", "near")
        if kind not in ("exact", "near"):
            raise PlanError(f"group {gid}: kind must be 'exact' or 'near'")
        out.append({"id": gid, "kind": kind, "keeper": keeper, "members": members, "excluded": excluded})
    if len({g["id"] for g in out}) != len(out):
        raise PlanError("two groups of the plan have one id")
    return out


def build(groups: list[dict], rows: dict[int, dict], *, db: str | None, layer: str | None,
          keeper_rule: str, choose_keeper, keeper_reason) -> dict:
    """The plan document from checked decisions and the catalog rows of their ids (id -> row)."""
    out = []
    for g in groups:
        missing = [i for i in g["members"] + g["excluded"] if i not in rows]
        if missing:
            raise PlanError(f"group {g['id']}: no indexed item with id {missing[0]}")
        members = [_member(rows[i]) for i in g["members"]]
        rule_pick = g["members"][choose_keeper([rows[i] for i in g["members"]])]
        if g["keeper"] == rule_pick:
            reason = keeper_reason([rows[i] for i in g["members"]], g["members"].index(rule_pick))
        else:
            reason = CHOSEN
        out.append({"id": g["id"], "kind": g["kind"], "keeper": g["keeper"], "keeper_reason": reason,
                    "members": members, "excluded": [_member(rows[i]) for i in g["excluded"]]})
    return {"format": PLAN_FORMAT, "created_at": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "db": db, "layer": layer, "rules": {"keeper": keeper_rule}, "groups": out}


def _member(row: dict) -> dict:
    return {"id": int(row["id"]), "path": row["path"], "size": row.get("size"), "sha256": row.get("sha256")}


def to_csv(plan: dict) -> str:
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=CSV_COLUMNS, lineterminator="\n")
    writer.writeheader()
    for g in plan["groups"]:
        for m in g["members"] + g["excluded"]:
            decision = ("stays" if m["id"] == g["keeper"] else "moves") if m in g["members"] else "not a copy"
            writer.writerow({"group": g["id"], "kind": g["kind"], "decision": decision, "id": m["id"],
                             "path": m["path"], "size": m["size"], "sha256": m["sha256"],
                             "keeper_reason": g["keeper_reason"] if decision == "stays" else ""})
    return buf.getvalue()


def parse(text: str) -> tuple[list[dict], dict]:
    """Plan file text (JSON or CSV) -> (checked decisions, the file's records by id: path, sha256)."""
    stripped = text.lstrip()
    if stripped.startswith("{"):
        try:
            data = json.loads(text)
        except ValueError as exc:
            raise PlanError(f"the plan is not valid JSON: {exc}") from None
        if data.get("format") != PLAN_FORMAT:
            raise PlanError(f"this JSON file is not a kinscope plan (format {PLAN_FORMAT})")
        groups = data.get("groups") if isinstance(data.get("groups"), list) else None
        records = {m["id"]: m for g in groups or [] if isinstance(g, dict)
                   for m in (g.get("members") or []) + (g.get("excluded") or []) if isinstance(m, dict) and "id" in m}
        flat = {"groups": [{**g, "members": [m.get("id") for m in g.get("members", []) if isinstance(m, dict)],
                            "excluded": [m.get("id") for m in g.get("excluded", []) if isinstance(m, dict)]}
                           for g in groups or [] if isinstance(g, dict)]} if groups is not None else data
        return decisions_of(flat), records
    return _parse_csv(text)


def _parse_csv(text: str) -> tuple[list[dict], dict]:
    reader = csv.DictReader(io.StringIO(text))
    if not reader.fieldnames or not {"group", "decision", "id", "path"} <= set(reader.fieldnames):
        raise PlanError("the plan is neither a kinscope JSON plan nor a CSV with columns group, decision, id, path")
    groups: dict[str, dict] = {}
    records = {}
    for n, row in enumerate(reader, start=2):
        try:
            item = int(row["id"])
        except (TypeError, ValueError):
            raise PlanError(f"line {n}: id must be a whole number") from None
        role = DECISIONS.get((row.get("decision") or "").strip())
        if role is None:
            raise PlanError(f"line {n}: decision must be one of: {', '.join(DECISIONS)}")
        g = groups.setdefault(row["group"], {"id": row["group"], "kind": row.get("kind") or "near", "keeper": None,
                                             "members": [], "excluded": []})
        if role == "keeper":
            if g["keeper"] is not None:
                raise PlanError(f"line {n}: group {row['group']} has two files that stay")
            g["keeper"] = item
        (g["excluded"] if role == "excluded" else g["members"]).append(item)
        records[item] = {"id": item, "path": row["path"], "sha256": row.get("sha256") or None}
    return decisions_of({"groups": list(groups.values())}), records


def check_against(plan: dict, records: dict) -> None:
    """Refuse a plan whose file names a path or content hash other than the catalog's for an id."""
    for g in plan["groups"]:
        for m in g["members"] + g["excluded"]:
            given = records.get(m["id"], {})
            if given.get("path") not in (None, m["path"]):
                raise PlanError(f"item {m['id']} is {m['path']} in the catalog but {given['path']} in the plan; "
                                "make a new plan from the review page")
            if given.get("sha256") and m["sha256"] and given["sha256"] != m["sha256"]:
                raise PlanError(f"{m['path']} has another content hash in the plan than in the catalog; "
                                "make a new plan from the review page")


# --- an archive's side ------------------------------------------------------------------------------------
def _rows(archive, ids: set[int]) -> dict[int, dict]:
    from .groups import ROW_COLUMNS

    out, ids = {}, sorted(ids)
    for start in range(0, len(ids), 900):  # SQLite's bound-parameter limit
        chunk = ids[start:start + 900]
        marks = ",".join("?" * len(chunk))
        for r in archive.catalog.db.query(
                f"select {', '.join(ROW_COLUMNS)} from images where status = 'ok' and id in ({marks})", chunk):
            out[int(r["id"])] = r
    return out


def _build(archive, groups: list[dict], layer) -> dict:
    from . import groups as dup

    rows = _rows(archive, {i for g in groups for i in g["members"] + g["excluded"]})
    return build(groups, rows, db=str(archive.db), layer=layer, keeper_rule=dup.KEEPER_RULE,
                 choose_keeper=dup.choose_keeper, keeper_reason=dup.keeper_reason)


def plan_from_decisions(archive, decisions) -> dict:
    """What the review page sends ({layer, groups: [{id, kind, keeper, members, excluded}]}) -> the plan."""
    layer = decisions.get("layer") if isinstance(decisions, dict) else None
    return _build(archive, decisions_of(decisions), layer if isinstance(layer, str) else None)


def plan_from_file(archive, text: str) -> dict:
    """A plan file's text (JSON or CSV) -> the plan, checked against the catalog."""
    groups, records = parse(text)
    plan = _build(archive, groups, None)
    check_against(plan, records)
    return plan
