"""An 8-bit copy of kinscope's fp32 graph, for scripts/bench_int8.py only: ONNX Runtime static quantisation
(QDQ) of the cached fp32 graph, without torch. kinscope does not offer it as an engine: on this project's
benchmarks it lost copies found first and duplicate recall and was not faster on a quiet machine
(docs/benchmarks.md, "An 8-bit engine"). The engine built on it, with its archive checks, is on the
branch issue-20q in the repository's history.

Calibrated on bundled open images, never on the archive: 64 crops (varied size, place, mirror, some in
grey) of the two photographs scikit-learn ships (sklearn.datasets.load_sample_images: china.jpg,
flower.jpg), so that one int8 graph serves every archive with the same fp32 graph and can be built again
anywhere, byte for byte, from the fp32 graph alone. The file sits beside its fp32 graph, named by a key
of that graph's name, the quantiser settings (QUANTISER), the calibration images' SHA-256 and
QUANT_FORMAT. Only convolutions are quantised; GeM pooling, normalisation and the channel peaks stay in
float. Weights per channel with 7-bit range: AVX2 without VNNI can saturate 8-bit products
(onnxruntime's quantisation notes). What it costs in retrieval is measured in docs/benchmarks.md
("An 8-bit engine"); descriptors from it are not interchangeable with fp32 ones.
"""
from __future__ import annotations

import hashlib
import json
import tempfile
from pathlib import Path

import numpy as np
from PIL import Image

from index.common.files import atomic_write, sha256_file
from index.images.preprocess import fit_square, to_input
from index.model.onnx_engine import META_KEY, EngineError, OnnxEngine

QUANT_FORMAT = 1  # bump when the way the graph is quantised changes
QUANTISER = {"format": "QDQ", "ops": ["Conv"], "per_channel": True, "reduce_range": True,
             "activations": "QUInt8", "weights": "QInt8", "method": "MinMax"}
CALIBRATION_CROPS = 64
CALIBRATION_SEED = 0
CALIBRATION_SOURCE = "scikit-learn's sample images (china.jpg, flower.jpg)"
CHECK_IMAGES = 8  # held-out crops run through both graphs after a build: the descriptors' cosines
MISSING = ("an 8-bit graph needs onnxruntime's quantisation module (onnxruntime.quantization), "
           "which this installation lacks; reinstall onnxruntime to run this benchmark")


def quantisation_available() -> bool:
    try:
        import onnxruntime.quantization  # noqa: F401
    except ImportError:
        return False
    return True


def _sample_files() -> list[Path]:
    from sklearn.datasets import load_sample_images

    return [Path(f) for f in load_sample_images().filenames]


def calibration_id() -> dict:
    """What the calibration set is: its source, crops, seed and the files' SHA-256."""
    return {"source": CALIBRATION_SOURCE, "crops": CALIBRATION_CROPS, "seed": CALIBRATION_SEED,
            "sha256": [sha256_file(f) for f in _sample_files()]}


def int8_key(fp32_path: Path) -> str:
    key = {"format": QUANT_FORMAT, "fp32": Path(fp32_path).name, "quantiser": QUANTISER,
           "calibration": calibration_id()}
    return hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()[:16]


def int8_path(fp32_path: Path) -> Path:
    """Where the int8 graph of this fp32 graph is kept: beside it."""
    fp32_path = Path(fp32_path)
    return fp32_path.with_name(f"{fp32_path.stem}-int8-{int8_key(fp32_path)}.onnx")


def calibration_pixels(size: int, count: int = CALIBRATION_CROPS, seed: int = CALIBRATION_SEED) -> np.ndarray:
    """(count, size, size, 3) uint8: crops of the bundled photographs, as fit_square gives the network."""
    images = []
    for f in _sample_files():
        with Image.open(f) as im:
            images.append(im.convert("RGB"))
    rng = np.random.default_rng(seed)
    out = []
    for k in range(count):
        image = images[k % len(images)]
        w, h = image.size
        cw = int(w * rng.uniform(0.3, 1.0))
        ch = min(h, int(cw * h / w * rng.uniform(0.7, 1.3)))
        x, y = int(rng.integers(0, w - cw + 1)), int(rng.integers(0, h - ch + 1))
        crop = image.crop((x, y, x + cw, y + ch))
        if k % 4 == 1:
            crop = crop.transpose(Image.Transpose.FLIP_LEFT_RIGHT)
        if k % 8 == 3:
            crop = crop.convert("L").convert("RGB")
        out.append(fit_square(crop, size))
    return np.stack(out)


def _reader(pixels: np.ndarray, mean, std, batch: int = 8):
    from onnxruntime.quantization import CalibrationDataReader

    class Batches(CalibrationDataReader):
        def __init__(self):
            self.start = 0

        def get_next(self):
            if self.start >= len(pixels):
                return None
            x = to_input(pixels[self.start:self.start + batch], mean, std)
            self.start += batch
            return {"input": x}

    return Batches()


def build_int8(fp32_path: Path, names: list[str], *, size: int, mean, std) -> dict:
    """Quantise the fp32 graph into int8_path(fp32_path) (atomically; the cache is shared) and check it
    against the fp32 graph on held-out crops; the per-layer median cosines, also kept in its metadata."""
    if not quantisation_available():
        raise EngineError(MISSING)
    import onnx
    from onnxruntime.quantization import QuantFormat, QuantType, quant_pre_process, quantize_static

    fp32_path, out = Path(fp32_path), int8_path(fp32_path)
    pixels = calibration_pixels(size, CALIBRATION_CROPS + CHECK_IMAGES)
    with tempfile.TemporaryDirectory(prefix=".int8-", dir=out.parent) as tmp:
        pre, quantised = Path(tmp) / "pre.onnx", Path(tmp) / "int8.onnx"
        try:
            quant_pre_process(str(fp32_path), str(pre), skip_symbolic_shape=True)
            quantize_static(str(pre), str(quantised), _reader(pixels[:CALIBRATION_CROPS], mean, std),
                            quant_format=QuantFormat.QDQ, op_types_to_quantize=QUANTISER["ops"],
                            per_channel=QUANTISER["per_channel"], reduce_range=QUANTISER["reduce_range"],
                            activation_type=QuantType.QUInt8, weight_type=QuantType.QInt8)
        except Exception as exc:  # onnxruntime raises many kinds; the message is what the user needs
            raise EngineError(f"cannot quantise {fp32_path.name} to 8 bits: {exc}") from None
        check = to_input(pixels[CALIBRATION_CROPS:], mean, std)
        cosines = agreement(OnnxEngine(fp32_path, names), OnnxEngine(quantised, names), check)
        model = onnx.load(str(quantised))
        meta = {p.key: p.value for p in model.metadata_props}
        info = json.loads(meta.get(META_KEY, "{}"))
        info["int8"] = {"key": int8_key(fp32_path), "quantiser": QUANTISER, "calibration": calibration_id(),
                        "median_cosine_to_fp32": cosines}
        onnx.helper.set_model_props(model, {**meta, META_KEY: json.dumps(info)})
        atomic_write(out, model.SerializeToString())
    return cosines


def agreement(fp32: OnnxEngine, int8: OnnxEngine, batch: np.ndarray) -> dict[str, float]:
    """Per layer, the median cosine of int8 descriptors to their fp32 twins on `batch`."""
    a, b = fp32.embed(batch)[0], int8.embed(batch)[0]
    return {n: round(float(np.median(np.sum(a[n] * b[n], axis=1))), 4) for n in fp32.names}


def ensure_int8(fp32_path: Path, names: list[str], *, size: int, mean, std) -> Path:
    """The int8 graph of this fp32 graph, built first when missing (no torch: ONNX Runtime alone)."""
    path = int8_path(fp32_path)
    if not path.is_file():
        build_int8(fp32_path, names, size=size, mean=mean, std=std)
    return path
