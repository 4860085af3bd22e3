"""The collection map as Archive offers it (Archive inherits MapJobs); see docs/map.md."""
from __future__ import annotations

from ..common.errors import ArchiveError


class MapJobs:
    """Methods of index.api.Archive; `self` has ._layer(name) and what index.map.collection reads."""

    def map(self, *, layer: str | None = None, seed: int = 0, full: bool = False, sample: int | None = None,
            progress=None) -> dict:
        """Lay the layer's items out in 2-D by similarity and store it (map-<layer>.npz), or bring a
        stored map up to date (new items placed by their neighbours); see docs/map.md."""
        from . import collection as cm

        try:
            return cm.build(self, self._layer(layer)["name"], seed=seed, full=full,
                            sample=cm.ml.SAMPLE if sample is None else int(sample), progress=progress)
        except cm.MapError as exc:
            raise ArchiveError(str(exc)) from None

    def map_view(self, layer: str | None = None) -> dict | None:
        """The stored map as of the committed state (updated in memory only), with each item's folder
        and date; None when `kinscope map` has not been run for the layer."""
        from . import collection as cm

        try:
            return cm.current(self, self._layer(layer)["name"])
        except cm.MapError as exc:
            raise ArchiveError(str(exc)) from None
