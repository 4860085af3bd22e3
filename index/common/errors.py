"""The one error the user sees: a plain sentence, never a stack trace."""
from __future__ import annotations


class ArchiveError(Exception):
    """Anything the user must fix: a plain sentence, never a stack trace."""
