"""Near-duplicate groups, the keeper rule, quarantine moves and their undo, the static review page."""
