"""Bounded decode memory: the decoder's own estimate before decoding, 16-bit images reduced early,
and Pillow's warnings kept out of the terminal."""
from __future__ import annotations

import json
import os
import subprocess
import sys
import warnings

import numpy as np
import pytest
from PIL import Image

from index.images.decode import DecodeError, open_image
from index.images.decode_memory import DEFAULT_MAX_DECODE_BYTES, deep_to_8bit, estimate, reduce
from index.ingest.decode_task import read_file

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SIDE = 9950  # 99 million pixels: just under the 100-million-pixel limit, as in the report


@pytest.fixture(scope="module")
def deep_png(tmp_path_factory):
    """A 16-bit grey PNG of 9950 x 9950 pixels (a ramp; under 1 MB on disk) and its 16-bit values' ramp."""
    ramp = np.linspace(0, 65535, SIDE).astype(np.uint16)
    path = tmp_path_factory.mktemp("deep") / "deep16.png"
    Image.fromarray(np.ascontiguousarray(np.broadcast_to(ramp[None, :], (SIDE, SIDE)))).save(path)
    return path, ramp


def test_the_16_bit_png_is_estimated_small_and_reduced_correctly(deep_png):
    path, ramp = deep_png
    assert path.stat().st_size < 1_000_000
    with Image.open(path) as im:
        assert im.mode == "I;16"
        need = estimate(im, 384)
    decoded = SIDE * SIDE * 2  # 2 bytes a pixel, one band
    assert decoded <= need < decoded + 64_000_000  # the decoded pixels and little more: no full-size copies
    image = open_image(path, min_side=384).image
    factor = SIDE // 384
    assert image.size == (-(-SIDE // factor),) * 2 and image.mode == "RGB"
    # Expected: each box's mean of the 16-bit values, scaled by 255/65535 (round(v / 257), the PNG
    # specification's scaling of 16-bit samples to 8 bits).
    means = np.add.reduceat(ramp.astype(np.float64), np.arange(0, SIDE, factor)) / np.minimum(
        factor, SIDE - np.arange(0, SIDE, factor))
    got = np.asarray(image)[0, :, 0].astype(int)
    assert np.abs(got - np.rint(means / 257)).max() <= 1


def test_the_16_bit_png_peak_memory_stays_near_its_pixels(deep_png):
    """In a fresh process, as a decode worker: the peak grows by about the decoded pixels (0.2 GB), not
    by the 1.3 GB the convert-then-reduce path took (scripts/measure_decode_memory.py)."""
    path, _ = deep_png
    code = ("import json, sys\n"
            "def hwm():\n"
            "    return next(int(l.split()[1]) * 1024 for l in open('/proc/self/status') if l.startswith('VmHWM:'))\n"
            "from index.images.decode import open_image\n"
            "base = hwm(); open_image(sys.argv[1], min_side=384); print(json.dumps(hwm() - base))\n")
    out = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True, text=True, check=True,
                         env={**os.environ, "PYTHONPATH": REPO}, cwd=path.parent)
    growth = json.loads(out.stdout)
    assert growth < 400_000_000, f"{growth / 1e6:.0f} MB"


def test_a_decode_over_the_byte_limit_is_refused_before_decoding(deep_png):
    path, _ = deep_png
    with pytest.raises(DecodeError, match=r"would take about 2\d\d MB of memory to decode .* limit 100 MB"):
        open_image(path, min_side=384, max_bytes=100_000_000)
    assert DEFAULT_MAX_DECODE_BYTES >= 1 << 30  # every image under the pixel limit fits the default


@pytest.mark.parametrize("mode", ["I;16", "I", "F"])
def test_deep_images_in_stripes_equal_the_whole_image_conversion(mode):
    rng = np.random.default_rng(3)
    values = rng.integers(0, 65535, (333, 250)).astype({"I;16": np.uint16, "I": np.int32, "F": np.float32}[mode])
    im = Image.fromarray(values, mode if mode != "I;16" else None)
    assert im.mode == mode
    whole = np.clip(np.rint(values.astype(np.float64) / 257), 0, 255)  # what one pass over the image gives
    import index.images.decode_memory as dm

    stripes = dm.STRIPE_BYTES
    try:
        dm.STRIPE_BYTES = 1000  # many stripes
        got = np.asarray(deep_to_8bit(im, 1)).astype(int)
        reduced = np.asarray(deep_to_8bit(im, 4)).astype(float)
    finally:
        dm.STRIPE_BYTES = stripes
    assert np.abs(got - whole).max() <= (0 if mode == "I;16" else 1)
    box = np.add.reduceat(np.add.reduceat(values.astype(np.float64), np.arange(0, 333, 4), 0),
                          np.arange(0, 250, 4), 1) / np.outer(np.minimum(4, 333 - np.arange(0, 333, 4)),
                                                              np.minimum(4, 250 - np.arange(0, 250, 4)))
    assert reduced.shape == (84, 63) and np.abs(reduced - np.rint(box / 257)).max() <= 1


def test_alpha_images_reduced_in_stripes_equal_pillows_reduce():
    import index.images.decode_memory as dm

    rng = np.random.default_rng(4)
    im = Image.fromarray(rng.integers(0, 256, (301, 203, 4), dtype=np.uint8), "RGBA")
    stripes = dm.STRIPE_BYTES
    try:
        dm.STRIPE_BYTES = 5000
        assert reduce(im, 3).tobytes() == im.reduce(3).tobytes()
    finally:
        dm.STRIPE_BYTES = stripes


def _bomb_warning_png(path, cut: bool = False):
    """An 8-bit grey PNG of 9000 x 10000 pixels: over Pillow's warning level (89 million), under ours."""
    Image.new("L", (9000, 10000), 90).save(path)
    if cut:
        data = path.read_bytes()
        path.write_bytes(data[: len(data) // 2])
    return path


def test_pillow_warnings_become_part_of_a_failure_reason(tmp_path):
    path = _bomb_warning_png(tmp_path / "big-cut.png", cut=True)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a warning escaping read_file would fail here
        result = read_file(str(path), 256)
    assert "error" in result and "the decoder warned" in result["error"] and "decompression bomb" in result["error"]


def test_pillow_warnings_stay_out_of_the_terminal(tmp_path):
    folder = tmp_path / "imgs"
    folder.mkdir()
    _bomb_warning_png(folder / "big.png")
    _bomb_warning_png(folder / "big-cut.png", cut=True)
    out = subprocess.run([sys.executable, "-m", "index", "index", str(folder), "--db", str(tmp_path / "db"), "-q",
                          "--layers", "colour"], capture_output=True, text=True, env={**os.environ, "PYTHONPATH": REPO},
                         timeout=600)
    assert out.returncode == 0, out.stderr
    assert "Warning" not in out.stderr and "warn" not in out.stderr.lower(), out.stderr
    assert "1 embedded, 1 could not be read" in out.stdout
