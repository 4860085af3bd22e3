"""What an average image of the archive looks like to the network: the reference explanations centre on.

- The mean descriptor of a layer: the mean of its stored (L2-normalised) descriptors, over up to
  DESCRIPTOR_SAMPLE of them evenly spread over the ids. Reading them back from the in-memory store takes
  milliseconds, so it is computed when first needed after each indexing checkpoint (the manifest's
  generation) and kept in memory only.
- The mean cell feature of the layer the region pairs read: the mean over all cells of the feature maps
  of up to CELL_SAMPLE archive images, evenly spread over the ids. That needs the images and a forward
  pass each (a few seconds), so it is kept in the database folder (BASELINE_FILE) and computed again
  only when the number of indexed images has changed by more than a quarter since.
Below MIN_IMAGES indexed images there is no useful average and the callers do not centre.
"""
from __future__ import annotations

import io
from pathlib import Path
from typing import Callable

import numpy as np

from ..common.files import atomic_write

DESCRIPTOR_SAMPLE = 20_000
CELL_SAMPLE = 48
MIN_IMAGES = 8
BASELINE_FILE = "explain-baseline.npz"
REFRESH_CHANGE = 0.25  # recompute the mean cell feature when the image count moved by more than this


def spread_sample(ids: np.ndarray, n: int) -> np.ndarray:
    """Up to n of the ids, evenly spread over their sorted order (deterministic)."""
    ids = np.sort(np.asarray(ids, np.int64))
    if len(ids) <= n:
        return ids
    return ids[np.linspace(0, len(ids) - 1, n).round().astype(np.int64)]


class Baseline:
    """The archive's mean descriptor per layer and mean cell feature per graph node, cached."""

    def __init__(self, db: Path):
        self.path = Path(db) / BASELINE_FILE
        self._descriptors: dict[str, tuple[object, np.ndarray, int]] = {}

    def descriptor(self, layer: str, generation, store) -> tuple[np.ndarray | None, int]:
        """(mean descriptor (C,), how many descriptors it averages); None below MIN_IMAGES."""
        cached = self._descriptors.get(layer)
        if cached is None or cached[0] != generation:
            ids = spread_sample(store.ids(), DESCRIPTOR_SAMPLE)
            mean = store.reconstruct(ids).astype(np.float64).mean(axis=0) if len(ids) else np.zeros(store.dim)
            cached = self._descriptors[layer] = (generation, mean, len(ids))
        _, mean, n = cached
        return (mean if n >= MIN_IMAGES else None), n

    def cells(self, node: str, ids: np.ndarray,
              maps: Callable[[list[int]], np.ndarray]) -> tuple[np.ndarray | None, int]:
        """(mean cell feature (C,) at graph node `node`, how many images it averages); None below
        MIN_IMAGES. `maps(ids)` returns the (n, C, H, W) maps of the images it could read."""
        total = len(ids)
        if total < MIN_IMAGES:
            return None, 0
        saved = self._load()
        if node in saved:
            mean, n, then = saved[node]
            if abs(total - then) <= REFRESH_CHANGE * then and (n >= CELL_SAMPLE or total == then):
                return mean, n
        sums, count, images = 0.0, 0, 0
        sample = [int(i) for i in spread_sample(ids, CELL_SAMPLE)]
        for start in range(0, len(sample), 16):
            fmaps = maps(sample[start:start + 16])
            if len(fmaps):
                sums = sums + fmaps.astype(np.float64).sum(axis=(0, 2, 3))
                count += fmaps.shape[0] * fmaps.shape[2] * fmaps.shape[3]
                images += fmaps.shape[0]
        if images < MIN_IMAGES:
            return None, images
        mean = sums / count
        saved[node] = (mean, images, total)
        self._save(saved)
        return mean, images

    def _load(self) -> dict:
        try:
            with np.load(self.path) as data:
                nodes = [k.removeprefix("mean:") for k in data.files if k.startswith("mean:")]
                return {n: (data[f"mean:{n}"], int(data[f"images:{n}"]), int(data[f"total:{n}"])) for n in nodes}
        except (OSError, ValueError, KeyError):
            return {}

    def _save(self, saved: dict) -> None:
        arrays = {}
        for node, (mean, images, total) in saved.items():
            arrays.update({f"mean:{node}": mean, f"images:{node}": np.array(images), f"total:{node}": np.array(total)})
        buf = io.BytesIO()
        np.savez(buf, **arrays)
        try:
            atomic_write(self.path, buf.getvalue())
        except OSError:
            pass  # a read-only database folder: the mean is simply computed again next time
