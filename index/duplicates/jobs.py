"""The duplicate job as Archive offers it (Archive inherits DuplicateJobs): groups, review plans, the
quarantine move and its undo, the static review page. Uses the archive's catalog, reader and db folder."""
from __future__ import annotations

import os

from ..common.errors import ArchiveError


class DuplicateJobs:
    """Methods of index.api.Archive; `self` has .catalog, .reader and .db."""

    def duplicates(self, *, layer: str | None = None, threshold: float | None = None, normalised: bool = True,
                   progress: bool = False, prefer: list[str] | None = None, colour_check: bool = True,
                   loose_band: bool = True) -> dict:
        """Exact (content hash) and near (descriptor similarity) duplicate groups; see docs/duplicates.md.
        `prefer`: folders whose members the keeper rule prefers, in order. `colour_check=False` leaves out
        the colour check of near pairs (then recoloured designs group like copies); `loose_band=False` the joins
        through the loose band (an item that passes half the threshold against two members of a group)."""
        from . import groups as dup

        try:
            return dup.from_archive(self.catalog, self.reader, layer=layer, threshold=threshold,
                                    normalised=normalised, progress=progress, prefer=prefer,
                                    colour_check=colour_check, loose_band=loose_band)
        except dup.DuplicatesError as exc:
            raise ArchiveError(str(exc)) from None

    def quarantine(self, doc: dict, dest: str | os.PathLike, *, apply: bool = False) -> dict:
        """Move the non-keepers of `doc` (from `duplicates`) into `dest`, outside every indexed root,
        with a manifest to undo it; only the plan unless apply=True. Never deletes."""
        from .quarantine import move

        return move(doc, dest, self.catalog.known_roots(), db=str(self.db), apply=apply)

    @staticmethod
    def restore(manifest: str | os.PathLike, *, apply: bool = False) -> dict:
        """Put the files a quarantine manifest lists back where they were; never overwrites."""
        from .quarantine import restore

        return restore(manifest, apply=apply)

    @staticmethod
    def threshold_derivation() -> str:
        """How the default duplicate thresholds were derived: which data, which rule (plain text)."""
        from .calibration import explain

        return explain()

    @staticmethod
    def plan_csv(doc: dict) -> str:
        """A review plan (from duplicate_plan) as the CSV the review page exports and --plan reads."""
        from .plan import to_csv

        return to_csv(doc)

    @staticmethod
    def write_review_page(doc: dict, path: str | os.PathLike) -> None:
        """A static HTML page of the groups in `doc`, thumbnails embedded (OSError if it cannot be written)."""
        from .review_page import write

        write(doc, path)

    @staticmethod
    def review_page_coverage(doc: dict) -> dict:
        """What the review page of `doc` leaves out: {shown: groups on the page, groups: all of them,
        unshown_moves: the files a quarantine move would move that only groups past the page's limit hold}."""
        from .review_page import shown_groups, unshown_moves

        return {"shown": len(shown_groups(doc)), "groups": len(doc["groups"]), "unshown_moves": unshown_moves(doc)}

    def duplicate_plan(self, decisions: dict | None = None, *, text: str | None = None) -> dict:
        """A review plan (index.duplicates.plan) from the review page's decisions, or from a plan file's text."""
        from . import plan as dup_plan

        try:
            if text is not None:
                return dup_plan.plan_from_file(self, text)
            return dup_plan.plan_from_decisions(self, decisions)
        except dup_plan.PlanError as exc:
            raise ArchiveError(str(exc)) from None
