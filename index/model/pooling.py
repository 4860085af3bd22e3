"""Pooling a feature map into a descriptor: GeM, L2 normalisation, PCA whitening."""
from __future__ import annotations

from pathlib import Path

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import torch

GEM_EPS = 1e-6  # activations are clamped here before the power, as in the GeM paper


def gem(fmaps: torch.Tensor, p: float = 3.0) -> torch.Tensor:
    """Generalised-mean pooling over positions (Radenovic, Tolias, Chum, TPAMI 2018).

    fmaps: (N, C, H, W) -> (N, C). p = 1 is average pooling; p -> infinity tends to max pooling.
    """
    n, c, h, w = fmaps.shape
    if p <= 0:
        raise ValueError(f"GeM exponent must be positive, got {p}")
    x = fmaps.clamp(min=GEM_EPS)
    if p == 1:
        return x.mean(dim=(2, 3))
    # Divide by the per-channel max first so large p does not overflow float32.
    scale = x.amax(dim=(2, 3), keepdim=True)
    pooled = (x / scale).pow(p).mean(dim=(2, 3)).pow(1.0 / p)
    return pooled * scale.view(n, c)


def l2_normalize(x: np.ndarray) -> np.ndarray:
    """Rows scaled to unit length (zero rows stay zero)."""
    n, d = x.shape
    norms = np.linalg.norm(x, axis=1, keepdims=True)
    return (x / np.maximum(norms, 1e-12)).astype(np.float32)


class PCAWhitening:
    """PCA whitening learned on an archive's own descriptors (Jegou and Chum, ECCV 2012).

    Fitted state has a trailing underscore; it is saved beside the manifest, never refitted silently.
    """

    def __init__(self, dim: int | None = None, power: float = -0.5):
        self.dim = dim
        self.power = power

    def fit(self, x: np.ndarray) -> "PCAWhitening":
        n, d = x.shape
        if n < 2:
            raise ValueError("PCA whitening needs at least two descriptors")
        out = min(self.dim or d, d, n - 1)
        self.mean_ = x.mean(axis=0).astype(np.float64)
        cov = np.cov((x - self.mean_).T)
        eigval, eigvec = np.linalg.eigh(cov)
        order = np.argsort(eigval)[::-1][:out]
        # A small floor keeps near-zero variance directions from blowing up.
        eigval = np.maximum(eigval[order], eigval[order][0] * 1e-6)
        self.projection_ = (eigvec[:, order] * eigval**self.power).T.astype(np.float32)
        self.mean_ = self.mean_.astype(np.float32)
        self.n_fitted_ = n
        return self

    def transform(self, x: np.ndarray) -> np.ndarray:
        n, d = x.shape
        assert d == self.mean_.shape[0], f"expected descriptors of dimension {self.mean_.shape[0]}, got {d}"
        return l2_normalize((x - self.mean_) @ self.projection_.T)

    @property
    def out_dim(self) -> int:
        return int(self.projection_.shape[0])

    def save(self, path: Path) -> None:
        from ..common.files import atomic_write

        import io

        buf = io.BytesIO()
        np.savez(buf, mean=self.mean_, projection=self.projection_, n=self.n_fitted_, power=self.power)
        atomic_write(Path(path), buf.getvalue())

    @classmethod
    def load(cls, path: Path) -> "PCAWhitening":
        with np.load(path) as data:
            obj = cls(power=float(data["power"]))
            obj.mean_, obj.projection_ = data["mean"], data["projection"]
            obj.n_fitted_ = int(data["n"])
            obj.dim = obj.out_dim
        return obj
