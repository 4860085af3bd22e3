"""The colour check of near-duplicate pairs (index/duplicates/colour.py).

Outside checks and their sources:
- CIELAB values against scikit-image's reference conversion `skimage.color.rgb2lab` (D65, 2-degree observer);
- the copies are the colour and quality edits used in copy-detection benchmarks (Douze et al., "The 2021 Image
  Similarity Dataset and Challenge", 2021): brightness, contrast, saturation, grayscale, JPEG, crop, resize;
- recolourings turn the hue in the HSV model (Smith, "Color gamut transform pairs", SIGGRAPH 1978) through
  scikit-image's `rgb2hsv` / `hsv2rgb`;
- the pictures are scikit-image's bundled images (`skimage.data`); the colourway pair is from the demo archive,
  whose answer key (demo_archive/key.csv) says both files are one motif in two colourways.
"""
from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageEnhance

from index.duplicates import colour as dc

COLOURFUL = ("astronaut", "coffee", "chelsea", "rocket", "immunohistochemistry", "retina", "logo")
DEMO = Path(__file__).resolve().parents[1] / "demo_archive"


def _sig(image: Image.Image) -> np.ndarray:
    image = image.convert("RGB")
    image.thumbnail((96, 96))
    return dc.signature(np.asarray(image))


def _jpeg(image: Image.Image, quality: int = 90) -> Image.Image:
    buf = io.BytesIO()
    image.convert("RGB").save(buf, "JPEG", quality=quality)
    return Image.open(io.BytesIO(buf.getvalue())).convert("RGB")


def _hue_turned(array: np.ndarray, degrees: float) -> Image.Image:
    from skimage import color

    hsv = color.rgb2hsv(array)
    hsv[..., 0] = (hsv[..., 0] + degrees / 360.0) % 1.0
    return Image.fromarray((color.hsv2rgb(hsv) * 255).round().astype(np.uint8))


def test_lab_matches_scikit_image():
    from skimage import color

    rgb = np.random.default_rng(0).integers(0, 256, (500, 3)).astype(np.uint8)
    ours = dc.lab(rgb)
    ref = color.rgb2lab(rgb[None].astype(np.float64) / 255.0)[0]
    assert np.abs(ours - ref).max() < 0.05


def test_hue_shift_is_the_turn_between_histograms():
    p = np.zeros(dc.BINS)
    p[3] = 1.0
    for k in (1, 5, 18):
        assert dc.hue_shift(p, np.roll(p, k)) == pytest.approx(k * 360 / dc.BINS)
    half = np.zeros(dc.BINS)
    half[[0, 18]] = 0.5  # two opposite hues: a turn by half the circle maps it onto itself
    assert dc.hue_shift(half, np.roll(half, 18)) == pytest.approx(0.0)


@pytest.mark.parametrize("name", COLOURFUL)
def test_copy_edits_keep_the_colour_and_a_turned_hue_does_not(name, sample_images):
    image = sample_images[name]
    array = np.asarray(image)
    w, h = image.size
    copies = {"brightness +30%": ImageEnhance.Brightness(image).enhance(1.3),
              "contrast -40%": ImageEnhance.Contrast(image).enhance(0.6),
              "saturation +80%": ImageEnhance.Color(image).enhance(1.8),
              "grayscale": image.convert("L").convert("RGB"), "jpeg 30": _jpeg(image, 30),
              "crop 70%": image.crop((0, 0, int(w * 0.84), int(h * 0.84))), "resize 50%": image.resize((w // 2, h // 2))}
    turned = {f"hue +{d}": _hue_turned(array, d) for d in (30, 60, 120)}
    original = _sig(image)
    for label, version in {**copies, **turned}.items():
        ok = dc.consistent(original[None], _sig(_jpeg(version))[None])[0]
        assert ok == (label in copies), (name, label, dc.shift(original[None], _sig(_jpeg(version))[None]))


def test_a_colourway_on_a_dark_ground_is_not_a_copy_of_one_on_a_light_ground():
    # same hues (purples), the colour moved from the dark to the light tones: the tone test catches it
    with open(DEMO / "key.csv", newline="") as fh:
        rows = {(r["motif"], r["colourway"]): r["path"] for r in csv.DictReader(fh) if r["kind"] == "original"}
    light, dark = (dc.read_signature(str(DEMO / rows[("chevron", c)])) for c in ("heather", "midnight plum"))
    hue, tone = dc.shift(light[None], dark[None])
    assert hue[0] < dc.MAX_HUE_SHIFT  # the hue alone would not tell them apart
    assert tone[0] > dc.MAX_TONE_SHIFT
    assert not dc.consistent(light[None], dark[None])[0]


def test_a_file_that_cannot_be_read_keeps_its_pairs(tmp_path, sample_images):
    good = tmp_path / "coffee.jpg"
    sample_images["coffee"].save(good)
    turned = tmp_path / "turned.jpg"
    _hue_turned(np.asarray(sample_images["coffee"]), 120).save(turned)
    broken = tmp_path / "broken.jpg"
    broken.write_bytes(b"not an image")
    paths = [str(good), str(turned), str(broken), str(tmp_path / "missing.jpg")]
    check = dc.PairCheck(paths)
    ok = check(np.array([0, 0, 0, 2]), np.array([1, 2, 3, 3]))
    assert ok.tolist() == [False, True, True, True]
    assert check.read == 4
    check(np.array([0]), np.array([1]))
    assert check.read == 4  # each file is read once per run


@pytest.mark.xfail(strict=True, reason=(
    "known limitation, measured (docs/duplicates.md, Colour check): a 5% cast moves the hue of a faint colour by "
    "tens of degrees; of the demo's ink-and-bone and heather originals 2 of 44 keep the pair. Allowances tried "
    "for the cast let 4-22 of the demo's 69 colourway near pairs through"))
def test_a_mild_colour_cast_on_a_muted_design_keeps_the_pair():
    # the demo's re-scan lighting (scripts/make_demo_archive.py): red and blue gains 1 +- 0.05, a warm cast
    with open(DEMO / "key.csv", newline="") as fh:
        paths = [r["path"] for r in csv.DictReader(fh)
                 if r["kind"] == "original" and r["colourway"] in ("ink and bone", "heather")]
    assert len(paths) >= 40
    kept = 0
    for path in paths:
        with Image.open(DEMO / path) as im:
            image = im.convert("RGB")
        warm = Image.fromarray(np.clip(np.asarray(image, np.float64) * [1.05, 1.0, 0.95], 0, 255).astype(np.uint8))
        kept += bool(dc.consistent(_sig(image)[None], _sig(_jpeg(warm))[None])[0])
    assert kept >= 0.9 * len(paths), f"{kept} of {len(paths)} kept"
