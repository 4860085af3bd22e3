"""The kinscope command (click): thin over index.api.Archive. `index.cli:main` is the entry point."""
from .commands import main

__all__ = ["main"]
