"""Per channel of a layer, the archive positions that excite it most (kept while indexing).

The positions come from the engines' channel peaks, which leave out the frame's outer ring of cells
(index.model.onnx_engine.PEAK_RING): there zero padding excites many channels in every image, and the
patches would show the frame instead of what the channel responds to in content. Files written before
that rule (no `ring` entry) have their ring entries dropped when loaded.
"""
from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from ..common.files import atomic_write
from ..model.onnx_engine import interior

TOP_N = 8


class Exemplars:
    """Top-N (value, image id, position) per channel; updated batch by batch, saved atomically."""

    def __init__(self, channels: int, top_n: int = TOP_N):
        self.values = np.full((channels, top_n), -np.inf, np.float32)
        self.ids = np.full((channels, top_n), -1, np.int64)
        self.positions = np.full((channels, top_n), -1, np.int64)  # flat index into the (H, W) grid
        self.grid = (0, 0)

    def update(self, ids: np.ndarray, peaks: np.ndarray, where: np.ndarray, grid: tuple[int, int]) -> None:
        """ids (N,), peaks (N, C) per-channel maxima, where (N, C) flat positions of those maxima."""
        n, c = peaks.shape
        assert ids.shape == (n,) and where.shape == (n, c), "ids, peaks and positions disagree"
        self.grid = tuple(int(v) for v in grid)
        # An image embedded again replaces its old entries.
        stale = np.isin(self.ids, ids)
        self.values[stale], self.ids[stale], self.positions[stale] = -np.inf, -1, -1
        values = np.concatenate([self.values, peaks.T.astype(np.float32)], axis=1)
        all_ids = np.concatenate([self.ids, np.broadcast_to(ids, (c, n))], axis=1)
        positions = np.concatenate([self.positions, where.T], axis=1)
        k = self.values.shape[1]
        order = np.argsort(-values, axis=1, kind="stable")[:, :k]
        self.values = np.take_along_axis(values, order, 1)
        self.ids = np.take_along_axis(all_ids, order, 1)
        self.positions = np.take_along_axis(positions, order, 1)

    def top(self, channel: int, alive: set[int] | None = None) -> list[dict]:
        """The strongest positions for one channel, best first (ids no longer indexed are left out)."""
        rows, cols = self.grid
        out = []
        for value, image_id, pos in zip(self.values[channel], self.ids[channel], self.positions[channel]):
            if image_id < 0 or (alive is not None and int(image_id) not in alive):
                continue
            out.append({"id": int(image_id), "value": float(value), "cell": [int(pos) // cols, int(pos) % cols]})
        return out

    def save(self, path: Path) -> None:
        buf = io.BytesIO()
        np.savez(buf, values=self.values, ids=self.ids, positions=self.positions, grid=np.array(self.grid),
                 ring=np.array(interior(*self.grid) if all(self.grid) else 0))
        atomic_write(Path(path), buf.getvalue())

    @classmethod
    def load(cls, path: Path) -> "Exemplars":
        with np.load(path) as data:
            obj = cls(data["values"].shape[0], data["values"].shape[1])
            obj.values, obj.ids, obj.positions = data["values"], data["ids"], data["positions"]
            obj.grid = tuple(int(v) for v in data["grid"])
            legacy = "ring" not in data.files
        if legacy and all(obj.grid):
            obj.drop_ring()
        return obj

    def drop_ring(self) -> None:
        """Forget entries on the frame's outer ring (from files written before peaks left it out)."""
        rows, cols = self.grid
        r = interior(rows, cols)
        row, col = np.divmod(self.positions, cols)
        ring = (self.ids >= 0) & ((row < r) | (row >= rows - r) | (col < r) | (col >= cols - r))
        self.values[ring], self.ids[ring], self.positions[ring] = -np.inf, -1, -1
        order = np.argsort(-self.values, axis=1, kind="stable")
        self.values = np.take_along_axis(self.values, order, 1)
        self.ids = np.take_along_axis(self.ids, order, 1)
        self.positions = np.take_along_axis(self.positions, order, 1)
