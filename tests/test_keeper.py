"""The keeper rule: its evidence (compression, padding, detail) and its choice on families of versions.

Pictures are scikit-image's bundled images and scikit-learn's sample photographs (via
conftest.sample_images and scripts/bench_keeper.py). The versions are made with transformations of the
copy-detection literature (Douze et al., "The 2021 Image Similarity Dataset and Challenge", 2021:
crops, rotations with padding, re-encoding, resizing, borders, colour changes).
"""
from __future__ import annotations

import importlib.util
import io
import os
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageEnhance, ImageOps

from index.duplicates import keeper, keeper_evidence
from index.duplicates.keeper_evidence import content_mask, detail_count, jpeg_quality

REPO = Path(__file__).resolve().parents[1]


def jpeg_bytes(image: Image.Image, quality: int) -> bytes:
    buf = io.BytesIO()
    image.save(buf, "JPEG", quality=quality)
    return buf.getvalue()


def rows_for(paths, mtime=1_700_000_000.0) -> list[dict]:
    out = []
    for p in paths:
        os.utime(p, (mtime, mtime), follow_symlinks=False)
        with Image.open(p) as im:
            w, h = im.size
        out.append({"path": str(p), "width": w, "height": h, "size": os.stat(p).st_size, "mtime": mtime})
    return out


# --- evidence --------------------------------------------------------------------------------------------
def test_jpeg_quality_is_read_back_from_the_quantisation_tables(sample_images):
    # Reference: Pillow's JPEG encoder (libjpeg), which scales ITU-T T.81 Annex K table K.1 by quality.
    for q in list(range(5, 101, 5)) + [92, 98]:
        with Image.open(io.BytesIO(jpeg_bytes(sample_images["coffee"], q))) as im:
            assert jpeg_quality(im.quantization[0]) == q


def test_padding_of_borders_and_rotations_is_found_and_a_pictures_own_background_is_not(sample_images):
    for name in ("astronaut", "coffee", "chelsea"):
        img = sample_images[name]
        pixels = img.width * img.height
        bordered = np.asarray(ImageOps.expand(img, border=40, fill=(255, 255, 255)))
        assert abs(content_mask(bordered).sum() / pixels - 1) < 0.03, name
        rotated = img.rotate(4, resample=Image.BICUBIC, expand=True, fillcolor=(206, 204, 198))
        rotated = Image.open(io.BytesIO(jpeg_bytes(rotated, 70))).convert("RGB")
        assert abs(content_mask(np.asarray(rotated)).sum() / pixels - 1) < 0.05, name
        assert content_mask(np.asarray(img)).all(), name  # a photograph has no padding
    horse = np.asarray(sample_images["horse"])  # a silhouette on white: the white is the picture's own
    assert content_mask(horse).all()


def test_detail_stays_put_under_magnification_and_drops_when_shrunk(sample_images):
    for name in ("astronaut", "coffee", "chelsea", "rocket"):
        grey = sample_images[name].convert("L")
        base = detail_count(np.asarray(grey), None, grey.width * grey.height)
        big = grey.resize((grey.width * 2, grey.height * 2), Image.BICUBIC)
        small = grey.resize((grey.width // 2, grey.height // 2), Image.LANCZOS)
        brighter = ImageEnhance.Contrast(grey).enhance(0.8)
        assert 0.75 < detail_count(np.asarray(big), None, big.width * big.height) / base < 1.25, name
        assert detail_count(np.asarray(small), None, small.width * small.height) / base < 0.75, name
        assert 0.85 < detail_count(np.asarray(brighter), None, grey.width * grey.height) / base < 1.15, name


# --- the rule on files -------------------------------------------------------------------------------------
def test_a_link_or_a_vanished_file_is_never_the_keeper(tmp_path, sample_images):
    (tmp_path / "a" / "long" / "folder").mkdir(parents=True)
    real = tmp_path / "a" / "long" / "folder" / "original.png"
    sample_images["coffee"].save(real)
    link = tmp_path / "l.png"
    os.symlink(real, link)
    rows = rows_for([real, link])
    rows[1]["mtime"] = 1.0  # older and shorter: the old rule would have kept the link
    keep, why, ev = keeper.KeeperRule().choose(rows)
    assert keep == 0 and why.startswith("the only member that can be kept (the others: a symbolic link")
    gone = dict(rows[0], path=str(tmp_path / "x.png"))  # a stale catalog row
    keep, why, _ = keeper.KeeperRule().choose([gone, rows[0]])
    assert keep == 1 and "the file is no longer there" in why
    keep, why, _ = keeper.KeeperRule().choose([gone])
    assert why.startswith("no member can be kept (the file is no longer there)")


def test_an_upscale_or_a_rotated_rescan_does_not_beat_its_source(tmp_path, sample_images):
    src = sample_images["astronaut"]
    (tmp_path / "s").mkdir()
    (tmp_path / "d").mkdir()
    source = tmp_path / "s" / "a.png"
    src.save(source)
    upscale = tmp_path / "d" / "b.png"  # lossless too: only the detail per pixel tells them apart
    src.resize((src.width * 2, src.height * 2), Image.BICUBIC).save(upscale)
    keep, why, _ = keeper.KeeperRule().choose(rows_for([upscale, source]))
    assert keep == 1 and why.startswith("same resolution, framing and compression; more detail per pixel"), why
    rescan = tmp_path / "d" / "c.jpg"  # the demo archive's case: rotated, relit, a larger canvas, JPEG
    tilted = src.rotate(-3, resample=Image.BICUBIC, expand=True, fillcolor=(206, 204, 198))
    rescan.write_bytes(jpeg_bytes(ImageEnhance.Brightness(tilted).enhance(1.05), 90))
    keep, why, _ = keeper.KeeperRule().choose(rows_for([rescan, source]))
    assert keep == 1 and why.startswith("same resolution; less border or rotation padding"), why


def test_a_preferred_folder_wins_and_the_reason_says_so(tmp_path, sample_images):
    (tmp_path / "big").mkdir()
    (tmp_path / "web").mkdir()
    big, small = tmp_path / "big" / "p.png", tmp_path / "web" / "p.jpg"
    sample_images["chelsea"].save(big)
    small.write_bytes(jpeg_bytes(sample_images["chelsea"].resize((225, 150)), 80))
    assert keeper.KeeperRule().choose(rows_for([small, big]))[0] == 1
    keep, why, _ = keeper.KeeperRule([str(tmp_path / "web")]).choose(rows_for([small, big]))
    assert keep == 0 and why == "in a folder given with --prefer"
    rule = keeper.KeeperRule([str(tmp_path / "elsewhere"), str(tmp_path / "web")])
    assert rule.choose(rows_for([big, small]))[1] == "in a folder given with --prefer (choice 2)"
    assert str(tmp_path / "web") in rule.text


def test_the_demo_archives_rescan_does_not_beat_its_clean_original():
    # Issue 22: the old rule kept rescans-2026/scan-0019.jpg (rotated -3 degrees, relit, JPEG q60, 404x404
    # only because the rotation enlarged its canvas) over the 384x384 original it was made from.
    demo = REPO / "demo_archive"
    rescan, original = demo / "rescans-2026" / "scan-0019.jpg", demo / "2024-spring" / "24S-047_paisley_midnight-plum_large.jpg"
    keep, why, ev = keeper.KeeperRule().choose(rows_for([rescan, original]))
    assert keep == 1, why
    assert ev[0].padding > 0.05 and abs(ev[0].content_pixels / ev[1].content_pixels - 1) < 0.05
    assert ev[0].quality == 60 and ev[1].quality == 85


# --- the families: the measured rate -------------------------------------------------------------------------
def _bench():
    spec = importlib.util.spec_from_file_location("bench_keeper", REPO / "scripts" / "bench_keeper.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_the_rule_keeps_the_source_of_its_families(tmp_path):
    """Seeds 6, 7 and 8 of scripts/bench_keeper.py were not used while the rule was chosen (seeds 1-5
    were). Measured when written: 0.958 with the versions newer than their source, 0.944 with every file
    at one modification time (the strict case, pixel and header evidence alone); the old rule 0.000."""
    bench = _bench()
    imgs = bench.sources()
    families = []
    for seed in (6, 7, 8):
        rng = np.random.default_rng(seed)
        families += [bench.build_family(tmp_path / f"seed{seed}", name, img, rng) for name, img in imgs.items()]
    rates = {}
    for cond in ("real times", "same times"):
        new = old = 0
        for members in families:
            rows = bench.rows_for(members, cond)
            new += bench.new_rule(rows) == 0
            old += bench.old_rule(rows) == 0
        rates[cond] = (new / len(families), old / len(families))
    assert rates["real times"][0] >= 0.95, rates
    assert rates["same times"][0] >= 0.90, rates
    assert max(r[1] for r in rates.values()) <= 0.05, rates  # the old rule, for contrast


@pytest.mark.parametrize("fmt", ["PNG", "TIFF", "BMP"])
def test_lossless_formats_count_as_the_lightest_compression(tmp_path, sample_images, fmt):
    path = tmp_path / f"x.{fmt.lower()}"
    sample_images["camera"].save(path, fmt)
    assert keeper_evidence.header_quality(str(path)) == 100.0
