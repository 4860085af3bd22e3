"""The torch side of the engines: torch eager (the reference) and exporting the ONNX model.

torch (eager, through torchvision's feature extractor) is the reference. The ONNX engine
(index.model.onnx_engine, torch-free) runs the same extractor exported with GeM pooling inside the
graph: each chosen layer's descriptor and channel peaks are graph outputs. export_onnx checks the
exported model against torch before it is cached. Which engine runs is chosen in index.model.choice;
the indexer has the model exported in a child process (index.model.child), never loading torch.
"""
from __future__ import annotations

import io
import os
import json
import warnings
from pathlib import Path

import numpy as np
import torch

from .onnx_engine import EXPORT_FORMAT, META_KEY, OPSET, EngineError, OnnxEngine, interior, output_names
from .pooling import GEM_EPS, l2_normalize
VERIFY_ATOL = 1e-5  # on L2-normalised descriptors of a random batch (the tests hold them to 1e-4)
VERIFY_PEAK_ATOL = 1e-3  # on channel maxima (ReLU6 activations, 0..6)


def pool(maps: dict[str, torch.Tensor], p: float) -> tuple[dict[str, np.ndarray], dict[str, tuple]]:
    """Feature maps -> per layer the L2-normalised GeM descriptor (N, C), and each channel's peak
    value (N, C) away from the frame's outer ring (index.model.onnx_engine.PEAK_RING), its flat position in
    the whole grid (N, C) and the grid (H, W).

    The arithmetic of index.model.pooling.gem (clamp at GEM_EPS, divide by the per-channel maximum, power,
    mean, root, rescale; bit for bit the same result), done in place: the maps are overwritten.
    In place matters: fresh 30 MB temporaries per batch cost more than the arithmetic (page faults).
    """
    if p <= 0:
        raise ValueError(f"GeM exponent must be positive, got {p}")
    descriptors, peaks = {}, {}
    with torch.inference_mode():
        # Two taps can hand back one tensor (an identity layer): each gets its own copy first.
        storages = [m.untyped_storage().data_ptr() for m in maps.values()]
        shared = {ptr for ptr in storages if storages.count(ptr) > 1}
        maps = {name: (m.clone() if m.untyped_storage().data_ptr() in shared else m) for name, m in maps.items()}
        for name, fmap in maps.items():
            n, c, h, w = fmap.shape
            peak, where = interior_peaks(fmap)
            peaks[name] = (peak.numpy(), where.numpy().astype(np.int64), (h, w))
            flat = fmap.contiguous().reshape(n, c, h * w)
            values = flat.amax(dim=2)
            x = flat.clamp_min_(GEM_EPS)
            if p == 1:
                pooled = x.mean(dim=2)
            else:
                scale = values.clamp_min(GEM_EPS).unsqueeze(2)  # = amax of the clamped map
                pooled = x.div_(scale).pow_(p).mean(dim=2).pow_(1.0 / p).mul_(scale.squeeze(2))
            descriptors[name] = l2_normalize(pooled.numpy())
    return descriptors, peaks


def interior_peaks(fmap: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """(N, C, H, W) -> each channel's largest value away from the outer ring, and its flat position
    in the whole (H, W) grid (slicing, not masking: it exports to ONNX as it is)."""
    n, c, h, w = fmap.shape
    r = interior(h, w)
    inner = fmap[:, :, r:h - r, r:w - r]
    values, where = inner.reshape(n, c, -1).max(dim=2)
    iw = w - 2 * r
    return values, (where // iw + r) * w + (where % iw + r)


class TorchEngine:
    name = "torch"

    def __init__(self, extractor: torch.nn.Module, names: list[str], threads: int | None = None, p: float = 3.0):
        self.extractor = extractor
        self.names = list(names)
        self.threads = threads
        self.p = p

    def maps(self, batch: np.ndarray) -> dict[str, torch.Tensor]:
        """(N, 3, S, S) float32 -> layer name -> (N, C, H, W) feature maps."""
        if self.threads:
            torch.set_num_threads(self.threads)
        with torch.inference_mode():
            out = self.extractor(torch.from_numpy(np.ascontiguousarray(batch, np.float32)))
        return {name: out[name] for name in self.names}

    def embed(self, batch: np.ndarray) -> tuple[dict[str, np.ndarray], dict[str, tuple]]:
        """(N, 3, S, S) float32 -> descriptors and peaks, as OnnxEngine.embed."""
        return pool(self.maps(batch), self.p)


class _Pooled(torch.nn.Module):
    """The extractor with GeM pooling, L2 normalisation and channel peaks as graph outputs (the
    arithmetic of `pool`, out of place so that it traces)."""

    def __init__(self, extractor: torch.nn.Module, names: list[str], p: float):
        super().__init__()
        self.extractor = extractor
        self.names = list(names)
        self.p = float(p)

    def forward(self, x):
        out = self.extractor(x)
        results = []
        for name in self.names:
            fmap = out[name]
            peak, where = interior_peaks(fmap)
            flat = fmap.reshape(fmap.shape[0], fmap.shape[1], -1)
            values = flat.amax(dim=2)
            clamped = flat.clamp(min=GEM_EPS)
            if self.p == 1:
                pooled = clamped.mean(dim=2)
            else:
                scale = values.clamp(min=GEM_EPS).unsqueeze(2)
                pooled = (clamped / scale).pow(self.p).mean(dim=2).pow(1.0 / self.p) * scale.squeeze(2)
            pooled = pooled / pooled.norm(dim=1, keepdim=True).clamp(min=1e-12)
            results += [pooled, peak, where]
        return tuple(results)


def export_onnx(extractor: torch.nn.Module, names: list[str], input_size: int, p: float, path: Path) -> None:
    """Export with pooling inside and a dynamic batch axis, check it against torch, write `path` atomically."""
    import onnx

    from ..common.files import atomic_write

    buf = io.BytesIO()
    dummy = torch.zeros(2, 3, input_size, input_size)
    outputs = output_names(names)
    with warnings.catch_warnings(), torch.inference_mode(False), torch.no_grad():
        warnings.simplefilter("ignore")
        grids = {name: list(fmap.shape[2:]) for name, fmap in extractor(dummy).items() if name in names}
        torch.onnx.export(_Pooled(extractor, names, p).eval(), (dummy,), buf, input_names=["input"],
                          output_names=outputs, opset_version=OPSET, dynamo=False,
                          dynamic_axes={"input": {0: "batch"}, **{o: {0: "batch"} for o in outputs}})
    model = onnx.load_from_string(buf.getvalue())
    onnx.helper.set_model_props(model, {META_KEY: json.dumps({"layers": list(names), "grids": grids, "p": float(p),
                                                              "format": EXPORT_FORMAT})})
    data = model.SerializeToString()
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(path).with_suffix(f".{os.getpid()}.unchecked")  # the cache is shared: exports may run at once
    tmp.write_bytes(data)
    try:
        difference, peak_difference = max_difference(TorchEngine(extractor, names, p=p), OnnxEngine(tmp, names),
                                                     input_size)
    finally:
        tmp.unlink(missing_ok=True)
    if not (difference <= VERIFY_ATOL and peak_difference <= VERIFY_PEAK_ATOL):
        raise EngineError(f"the exported model differs from torch by {difference:.2e} in descriptors and "
                          f"{peak_difference:.2e} in channel peaks (limits {VERIFY_ATOL:g}, {VERIFY_PEAK_ATOL:g})")
    atomic_write(Path(path), data)


def max_difference(a, b, input_size: int, batch: int = 2, seed: int = 0) -> tuple[float, float]:
    """Largest absolute differences between two engines' descriptors and channel peaks on a random batch."""
    x = np.random.default_rng(seed).normal(size=(batch, 3, input_size, input_size)).astype(np.float32)
    (da, pa), (db, pb) = a.embed(x), b.embed(x)
    return (max(float(np.abs(da[n] - db[n]).max()) for n in a.names),
            max(float(np.abs(pa[n][0] - pb[n][0]).max()) for n in a.names))
