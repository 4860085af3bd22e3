"""Tests for index.images.decode and index.images.metadata: every image is generated here, in tmp_path or memory.

Sources are named beside the checks.  "from memory" marks values recalled
rather than read from the document at hand; "common practice" marks trade
tolerances that no standard fixes.
"""

from __future__ import annotations

import io
import os
import struct
import warnings
import zlib

import numpy as np
import pytest
from PIL import Image, PngImagePlugin

from index.images import decode, metadata
from index.images.decode import (
    DEFAULT_MAX_PIXELS,
    SUPPORTED_EXTENSIONS,
    DecodeError,
    Decoded,
    open_image,
    read_metadata,
)

# --------------------------------------------------------------------------
# builders


def ramp_rgb(width: int, height: int) -> np.ndarray:
    """R rises left->right, G rises top->bottom: all 8 orientations differ."""
    x = np.linspace(0, 255, width)[None, :].repeat(height, 0)
    y = np.linspace(0, 255, height)[:, None].repeat(width, 1)
    return np.stack([x, y, np.full_like(x, 60)], axis=-1).round().astype(np.uint8)


def smooth_rgb(width: int, height: int) -> np.ndarray:
    """Photo-like smooth content (low frequencies only)."""
    yy, xx = np.mgrid[0:height, 0:width] / max(width, height)
    r = 128 + 100 * np.sin(2 * np.pi * 1.5 * xx)
    g = 128 + 100 * np.cos(2 * np.pi * 1.0 * yy)
    b = 128 + 90 * np.sin(2 * np.pi * (xx + yy))
    return np.stack([r, g, b], axis=-1).round().astype(np.uint8)


BLOCK_COLOURS = [(220, 30, 30), (30, 200, 40), (40, 50, 210), (240, 230, 40)]


def blocks_rgb(width: int = 64, height: int = 32) -> np.ndarray:
    """Four flat vertical bands; flat 16-px areas survive JPEG well."""
    a = np.zeros((height, width, 3), np.uint8)
    band = width // 4
    for i, colour in enumerate(BLOCK_COLOURS):
        a[:, i * band:(i + 1) * band] = colour
    return a


def band_centres(img: Image.Image) -> list[tuple[int, ...]]:
    a = np.asarray(img)
    band = a.shape[1] // 4
    y = a.shape[0] // 2
    return [tuple(int(v) for v in a[y, i * band + band // 2]) for i in range(4)]


def png_chunk(kind: bytes, data: bytes) -> bytes:
    # PNG spec (W3C PNG / ISO/IEC 15948), "Chunk layout": 4-byte big-endian
    # length, 4-byte type, data, CRC-32 computed over type and data.
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG spec, "PNG signature"


def png_ihdr(width: int, height: int, bit_depth: int = 8, colour_type: int = 2) -> bytes:
    # PNG spec, IHDR: width, height (4 bytes each), bit depth, colour type,
    # compression, filter, interlace (1 byte each).
    return png_chunk(b"IHDR", struct.pack(">IIBBBBB", width, height, bit_depth, colour_type, 0, 0, 0))


def png_from_samples(samples: np.ndarray, colour_type: int) -> bytes:
    """16-bit PNG: samples big-endian, each scanline led by filter byte 0 (PNG spec)."""
    height, width = samples.shape[:2]
    rows = samples.astype(">u2").reshape(height, -1)
    raw = b"".join(b"\x00" + row.tobytes() for row in rows)
    return (PNG_SIGNATURE + png_ihdr(width, height, 16, colour_type)
            + png_chunk(b"IDAT", zlib.compress(raw)) + png_chunk(b"IEND", b""))


def tiff_rgb16(samples: np.ndarray, byte_order: str = ">") -> bytes:
    """Uncompressed 16-bit RGB strip TIFF built from the TIFF 6.0 spec
    (header 'MM'/'II' + 42 + IFD offset; 12-byte IFD entries)."""
    height, width, _ = samples.shape
    data = samples.astype(byte_order + "u2").tobytes()
    bps_offset = 8 + 2 + 12 * 10 + 4
    data_offset = bps_offset + 6
    entries = [  # tag, type (3=SHORT, 4=LONG), count, value
        (256, 3, 1, width), (257, 3, 1, height), (258, 3, 3, bps_offset),
        (259, 3, 1, 1), (262, 3, 1, 2), (273, 4, 1, data_offset),
        (277, 3, 1, 3), (278, 3, 1, height), (279, 4, 1, len(data)), (284, 3, 1, 1),
    ]
    out = (b"MM" if byte_order == ">" else b"II") + struct.pack(byte_order + "HI", 42, 8)
    out += struct.pack(byte_order + "H", len(entries))
    for tag, kind, count, value in entries:
        if kind == 3 and count == 1:  # a SHORT value sits left-justified in the 4 bytes
            out += struct.pack(byte_order + "HHIHH", tag, kind, count, value, 0)
        else:
            out += struct.pack(byte_order + "HHII", tag, kind, count, value)
    out += struct.pack(byte_order + "I", 0) + struct.pack(byte_order + "3H", 16, 16, 16)
    return out + data


def jpeg_bytes(array: np.ndarray, **save_args) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(array).save(buf, "JPEG", quality=95, **save_args)
    return buf.getvalue()


def with_jpeg_segment(jpeg: bytes, marker: int, payload: bytes) -> bytes:
    # ITU-T T.81 Annex B: a marker segment is 0xFF, the marker byte, then a
    # 2-byte big-endian length that counts itself and the payload.  Placed
    # right after SOI (0xFFD8), as application segments usually are.
    assert jpeg[:2] == b"\xff\xd8"
    segment = bytes([0xFF, marker]) + struct.pack(">H", len(payload) + 2) + payload
    return jpeg[:2] + segment + jpeg[2:]


XMP_JPEG_HEADER = b"http://ns.adobe.com/xap/1.0/\x00"  # XMP Specification Part 3 (storage in files), APP1 namespace


def xmp_packet(title_items: list[tuple[str, str]] | None, subjects: list[str] | None) -> bytes:
    # ISO 16684-1 (XMP): dc:title is a language alternative (rdf:Alt of
    # rdf:li with xml:lang, 'x-default' the default), dc:subject an
    # unordered array (rdf:Bag).  Packet wrapper id is the fixed one the
    # standard gives (from memory).
    body = ""
    if title_items is not None:
        lis = "".join(f'<rdf:li xml:lang="{lang}">{text}</rdf:li>' for lang, text in title_items)
        body += f"<dc:title><rdf:Alt>{lis}</rdf:Alt></dc:title>"
    if subjects is not None:
        lis = "".join(f"<rdf:li>{s}</rdf:li>" for s in subjects)
        body += f"<dc:subject><rdf:Bag>{lis}</rdf:Bag></dc:subject>"
    return (
        '<?xpacket begin="\ufeff" id="W5M0MpCehiHzreSzNTczkc9d"?>'
        '<x:xmpmeta xmlns:x="adobe:ns:meta/">'
        '<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#">'
        '<rdf:Description rdf:about="" xmlns:dc="http://purl.org/dc/elements/1.1/">'
        f"{body}</rdf:Description></rdf:RDF></x:xmpmeta>"
        + " " * 200 + '<?xpacket end="w"?>'
    ).encode("utf-8")


def iptc_dataset(record: int, dataset: int, value: bytes, declared: int | None = None) -> bytes:
    # IPTC IIM 4.2, standard DataSet: tag marker 0x1C, record number,
    # DataSet number, 2-byte big-endian data length, data.
    size = len(value) if declared is None else declared
    return bytes([0x1C, record, dataset]) + struct.pack(">H", size) + value


def photoshop_app13(iim: bytes) -> bytes:
    # Image resource block (Photoshop file format specification, "Image
    # Resource Blocks"): '8BIM', 2-byte id (0x0404 = IPTC-NAA record),
    # Pascal name padded to even length, 4-byte size, data padded to even.
    # JPEG carries it in APP13 after the identifier 'Photoshop 3.0\0' (from memory).
    block = b"8BIM" + struct.pack(">H", 0x0404) + b"\x00\x00" + struct.pack(">I", len(iim)) + iim
    if len(iim) % 2:
        block += b"\x00"
    return b"Photoshop 3.0\x00" + block


def save(tmp_path, name: str, img: Image.Image, fmt: str | None = None, **kw):
    path = tmp_path / name
    img.save(path, fmt, **kw)
    return path


def mad(a, b) -> float:
    """Mean absolute difference of two images/arrays, in 8-bit levels."""
    return float(np.abs(np.asarray(a, np.float64) - np.asarray(b, np.float64)).mean())


# --------------------------------------------------------------------------
# contract basics


def test_supported_extensions_and_default_limit():
    assert SUPPORTED_EXTENSIONS == frozenset(
        {".jpg", ".jpeg", ".jpe", ".png", ".webp", ".tif", ".tiff", ".bmp", ".gif", ".heic", ".heif"})
    assert all(e == e.lower() and e.startswith(".") for e in SUPPORTED_EXTENSIONS)
    assert DEFAULT_MAX_PIXELS == 100_000_000


def test_decode_error_carries_reason():
    err = DecodeError("the file is empty")
    assert err.reason == "the file is empty" and str(err) == "the file is empty"


# --------------------------------------------------------------------------
# round trips


ROUND_TRIPS = [  # format, file name, save args, per-channel tolerance
    ("JPEG", "a.jpg", {"quality": 95}, 12),  # JPEG is lossy; flat bands stay close (common practice)
    ("PNG", "a.png", {}, 0),
    ("WEBP", "a.webp", {"lossless": True}, 0),
    ("TIFF", "a.tif", {}, 0),
    ("BMP", "a.bmp", {}, 0),
    ("GIF", "a.gif", {}, 0),  # four colours fit a palette exactly
]


@pytest.mark.parametrize("fmt,name,kw,tol", ROUND_TRIPS, ids=[r[0] for r in ROUND_TRIPS])
def test_format_round_trip(tmp_path, fmt, name, kw, tol):
    path = save(tmp_path, name, Image.fromarray(blocks_rgb()), fmt, **kw)
    result = open_image(path)
    assert isinstance(result, Decoded)
    assert result.format == fmt
    assert (result.width, result.height) == (64, 32) == result.image.size
    assert result.image.mode == "RGB"
    for got, want in zip(band_centres(result.image), BLOCK_COLOURS):
        assert max(abs(g - w) for g, w in zip(got, want)) <= tol, (got, want)
    assert set(result.metadata) == {"captured_at", "camera", "title", "keywords"}


def _heif_bytes(img: Image.Image, **kw) -> bytes:
    pillow_heif = pytest.importorskip("pillow_heif", reason="pillow-heif (optional extra) not installed")
    pillow_heif.register_heif_opener()
    buf = io.BytesIO()
    try:
        img.save(buf, "HEIF", **kw)
    except Exception as exc:  # libheif built without an HEVC encoder
        pytest.skip(f"pillow-heif cannot write HEIF here: {exc}")
    return buf.getvalue()


def test_heif_round_trip_with_exif(tmp_path):
    exif = Image.Exif()
    exif[0x010F] = "Fictocam"
    data = _heif_bytes(Image.fromarray(blocks_rgb()), quality=95, exif=exif)
    path = tmp_path / "a.heic"
    path.write_bytes(data)
    result = open_image(path)
    assert result.format == "HEIF"
    assert (result.width, result.height) == (64, 32)
    for got, want in zip(band_centres(result.image), BLOCK_COLOURS):
        # HEVC with 4:2:0 chroma is lossy; tolerance is common practice.
        assert max(abs(g - w) for g, w in zip(got, want)) <= 20, (got, want)
    assert result.metadata["camera"] == "Fictocam"


def test_heif_without_plugin_names_the_extra(monkeypatch):
    # ISO/IEC 14496-12 FileTypeBox: 4-byte size, 'ftyp', major brand, minor
    # version, compatible brands; 'heic' is a HEIF brand (ISO/IEC 23008-12).
    ftyp = struct.pack(">I", 24) + b"ftyp" + b"heic" + b"\x00\x00\x00\x00" + b"mif1heic"
    monkeypatch.setattr(decode, "_heif_ready", lambda: False)
    with pytest.raises(DecodeError) as info:
        open_image(ftyp + b"\x00" * 64)
    assert "pip install 'kinscope[heif]'" in info.value.reason


def test_content_not_extension_decides(tmp_path):
    path = save(tmp_path, "really_a_png.jpg", Image.fromarray(blocks_rgb()), "PNG")
    assert open_image(path).format == "PNG"


def test_unlisted_pillow_format_is_refused(tmp_path):
    # Pillow can read TGA, but it is not a supported format of this tool.
    path = save(tmp_path, "a.tga", Image.fromarray(blocks_rgb()), "TGA")
    with pytest.raises(DecodeError):
        open_image(path)


# --------------------------------------------------------------------------
# deep and unusual modes

VALUES_16 = np.array([[0, 257, 1000, 32768], [40000, 65280, 65535, 12345]], dtype=np.uint16)


def expected_8bit(values) -> np.ndarray:
    # 16 -> 8 bits maps 65535 onto 255, i.e. divide by 257 and round
    # (from memory; the PNG spec's sample depth scaling gives the same
    # result as the exact rescale v * 255 / 65535).
    return np.rint(np.asarray(values, np.float64) * 255 / 65535).astype(int)


def test_expected_8bit_is_not_clipping_or_truncating():
    # Guard on the test data itself: on VALUES_16 the rounded rescale differs from clipping at 255, from
    # dropping the low byte (>> 8) and from truncating the rescale, so a decoder doing any of them fails the
    # tests below. Each condition depends on VALUES_16: data of multiples of 257 only would fail it.
    values = VALUES_16.astype(np.int64)
    expected = expected_8bit(values)
    assert not np.array_equal(expected, np.minimum(values, 255))
    assert not np.array_equal(expected, values >> 8)
    assert not np.array_equal(expected, values * 255 // 65535)


def test_16bit_grey_png_hand_built():
    result = open_image(png_from_samples(VALUES_16, colour_type=0))
    got = np.asarray(result.image)
    assert got.dtype == np.uint8
    for channel in range(3):
        np.testing.assert_array_equal(got[..., channel], expected_8bit(VALUES_16))


@pytest.mark.parametrize("dtype", ["<u2", ">u2"], ids=["I;16", "I;16B"])
def test_16bit_grey_tiff(tmp_path, dtype):
    img = Image.fromarray(VALUES_16.astype(dtype))
    path = save(tmp_path, "g16.tif", img, "TIFF")
    with Image.open(path) as check:
        assert check.mode.startswith("I;16")  # the file really is 16-bit
    got = np.asarray(open_image(path).image)[..., 0]
    np.testing.assert_array_equal(got, expected_8bit(VALUES_16))


def test_32bit_int_tiff_with_16bit_values(tmp_path):
    path = save(tmp_path, "i32.tif", Image.fromarray(VALUES_16.astype(np.int32)), "TIFF")
    with Image.open(path) as check:
        assert check.mode == "I"
    got = np.asarray(open_image(path).image)[..., 0]
    np.testing.assert_array_equal(got, expected_8bit(VALUES_16))


def test_float_tiff_0_to_1_and_out_of_range(tmp_path):
    # Module policy (not a standard): float 0..1 -> x255; other ranges outside
    # 0..65535 are stretched min..max.
    unit = np.array([[0.0, 0.25, 0.5, 1.0]], np.float32)
    path = save(tmp_path, "f.tif", Image.fromarray(unit), "TIFF")
    np.testing.assert_array_equal(np.asarray(open_image(path).image)[..., 0], [[0, 64, 128, 255]])
    signed = np.array([[-100, 0, 100]], np.int32)
    path = save(tmp_path, "i.tif", Image.fromarray(signed), "TIFF")
    np.testing.assert_array_equal(np.asarray(open_image(path).image)[..., 0], [[0, 128, 255]])


RGB16 = np.array([[[1000, 257, 65535], [32768, 0, 40000], [128, 383, 65280]]], dtype=np.uint16)


def _assert_rgb16(result):
    got = np.asarray(result.image).astype(int)
    want = expected_8bit(RGB16)
    # Pillow has no 48-bit mode: it keeps the high byte of each sample, so
    # values may be 1 level under the rounded v/257, never clipped.
    assert np.abs(got - want).max() <= 1, (got, want)
    assert got[0, 0, 0] in (3, 4)  # 1000 -> 3.89, a clipping decoder would give 255


def test_16bit_rgb_png_hand_built():
    _assert_rgb16(open_image(png_from_samples(RGB16, colour_type=2)))


@pytest.mark.parametrize("order", [">", "<"], ids=["big-endian", "little-endian"])
def test_16bit_rgb_tiff_hand_built(order):
    _assert_rgb16(open_image(tiff_rgb16(RGB16, order)))


CMYK_SAMPLES = [(0, 0, 0, 0), (255, 0, 0, 0), (0, 0, 0, 255), (0, 128, 0, 64)]


def expected_rgb_from_cmyk(c, m, y, k):
    # Profile-free conversion R = (255-C)(255-K)/255 etc. (from memory).
    return tuple(round((255 - v) * (255 - k) / 255) for v in (c, m, y))


def cmyk_bands() -> Image.Image:
    a = np.zeros((32, 64, 4), np.uint8)
    for i, colour in enumerate(CMYK_SAMPLES):
        a[:, i * 16:(i + 1) * 16] = colour
    return Image.fromarray(a, "CMYK")


@pytest.mark.parametrize("fmt,name,tol", [("TIFF", "c.tif", 1), ("JPEG", "c.jpg", 8)])
def test_cmyk_to_rgb(tmp_path, fmt, name, tol):
    path = save(tmp_path, name, cmyk_bands(), fmt, **({"quality": 95} if fmt == "JPEG" else {}))
    with Image.open(path) as check:
        assert check.mode == "CMYK"
    result = open_image(path)
    assert result.image.mode == "RGB"
    for got, cmyk in zip(band_centres(result.image), CMYK_SAMPLES):
        want = expected_rgb_from_cmyk(*cmyk)
        assert max(abs(g - w) for g, w in zip(got, want)) <= tol, (cmyk, got, want)


# Compositing "over" a white background: out = a*C + (1-a)*255, a = alpha/255
# (PNG spec, "Alpha channel processing").
def over_white(colour, alpha):
    return round(alpha / 255 * colour + (1 - alpha / 255) * 255)


def test_palette_with_transparency_png(tmp_path):
    img = Image.new("P", (4, 2))
    img.putpalette([0, 0, 0, 255, 0, 0] + [0] * 762)
    img.putdata([0, 1, 1, 0, 1, 0, 0, 1])
    path = save(tmp_path, "p.png", img, "PNG", transparency=0)
    got = open_image(path).image
    assert got.getpixel((0, 0)) == (255, 255, 255)  # transparent index -> white, not black
    assert got.getpixel((1, 0)) == (255, 0, 0)


def test_gif_transparency(tmp_path):
    img = Image.new("P", (4, 2))
    img.putpalette([0, 0, 0, 0, 0, 255] + [0] * 762)
    img.putdata([0, 1, 0, 1, 1, 0, 1, 0])
    path = save(tmp_path, "t.gif", img, "GIF", transparency=0)
    got = open_image(path).image
    assert got.getpixel((0, 0)) == (255, 255, 255)
    assert got.getpixel((1, 0)) == (0, 0, 255)


def test_la_png_composites_on_white(tmp_path):
    la = np.array([[[0, 0], [0, 255], [0, 128], [200, 255]]], np.uint8)
    path = save(tmp_path, "la.png", Image.fromarray(la, "LA"), "PNG")
    with Image.open(path) as check:
        assert check.mode == "LA"
    got = np.asarray(open_image(path).image)[0, :, 0].astype(int)
    want = [over_white(0, 0), over_white(0, 255), over_white(0, 128), over_white(200, 255)]
    assert want[0] == 255
    assert np.abs(got - want).max() <= 1, (got, want)


def test_rgba_png_composites_on_white(tmp_path):
    rgba = np.array([[[255, 0, 0, 0], [0, 0, 255, 255], [0, 0, 0, 51]]], np.uint8)
    path = save(tmp_path, "rgba.png", Image.fromarray(rgba, "RGBA"), "PNG")
    got = open_image(path).image
    assert got.getpixel((0, 0)) == (255, 255, 255)
    assert got.getpixel((1, 0)) == (0, 0, 255)
    assert all(abs(v - over_white(0, 51)) <= 1 for v in got.getpixel((2, 0)))


def test_pa_mode_composites_on_white():
    # PA cannot be written by Pillow, so the conversion step is tested directly.
    img = Image.new("PA", (2, 1))
    img.putpalette([10, 20, 30] * 256)
    img.putpixel((0, 0), (0, 0))
    img.putpixel((1, 0), (0, 255))
    got = decode._to_rgb(img)
    assert got.mode == "RGB"
    assert got.getpixel((0, 0)) == (255, 255, 255) and got.getpixel((1, 0)) == (10, 20, 30)


def test_one_bit_png(tmp_path):
    img = Image.new("1", (4, 1))
    img.putdata([0, 1, 0, 1])
    path = save(tmp_path, "bw.png", img, "PNG")
    got = open_image(path).image
    assert [got.getpixel((x, 0)) for x in range(4)] == [(0, 0, 0), (255, 255, 255)] * 2


def test_ycbcr_tiff(tmp_path):
    path = save(tmp_path, "y.tif", Image.new("YCbCr", (8, 8), (100, 120, 140)), "TIFF")
    with Image.open(path) as check:
        assert check.mode == "YCbCr"
    y, cb, cr = 100, 120 - 128, 140 - 128
    # ITU-T T.871 (JFIF) YCbCr -> RGB equations.
    want = (y + 1.402 * cr, y - 0.344136 * cb - 0.714136 * cr, y + 1.772 * cb)
    got = open_image(path).image.getpixel((3, 3))
    assert all(abs(g - w) <= 2 for g, w in zip(got, want)), (got, want)


def test_multipage_tiff_gives_first_page(tmp_path):
    first = Image.new("RGB", (30, 20), (200, 0, 0))
    others = [Image.new("RGB", (50, 40), (0, 200, 0)), Image.new("RGB", (10, 10), (0, 0, 200))]
    path = tmp_path / "pages.tif"
    first.save(path, save_all=True, append_images=others)
    with Image.open(path) as check:
        assert check.n_frames == 3
    result = open_image(path)
    assert (result.width, result.height) == (30, 20)
    assert result.image.getpixel((5, 5)) == (200, 0, 0)


def test_animated_gif_gives_first_frame(tmp_path):
    frames = [Image.new("RGB", (16, 16), c) for c in [(255, 0, 0), (0, 255, 0), (0, 0, 255)]]
    path = tmp_path / "anim.gif"
    frames[0].save(path, save_all=True, append_images=frames[1:], duration=100, loop=0)
    with Image.open(path) as check:
        assert check.n_frames == 3
    assert open_image(path).image.getpixel((8, 8)) == (255, 0, 0)


# --------------------------------------------------------------------------
# EXIF orientation

# Exif 2.3 / CIPA DC-008, Orientation (0x0112): where the stored image's
# 0th row and 0th column lie when the picture is viewed upright.
ORIENTATION_TABLE = {
    1: ("top", "left"), 2: ("top", "right"), 3: ("bottom", "right"), 4: ("bottom", "left"),
    5: ("left", "top"), 6: ("right", "top"), 7: ("right", "bottom"), 8: ("left", "bottom"),
}


def upright_from_table(stored: np.ndarray, value: int) -> np.ndarray:
    """Build the upright view with numpy from the table's wording alone."""
    row0, col0 = ORIENTATION_TABLE[value]
    a = stored
    if row0 in ("left", "right"):
        a = a.transpose(1, 0, 2)  # stored rows become display columns
        if row0 == "right":
            a = a[:, ::-1]
        if col0 == "bottom":
            a = a[::-1, :]
    else:
        if row0 == "bottom":
            a = a[::-1, :]
        if col0 == "right":
            a = a[:, ::-1]
    return a


def exif_with(orientation) -> Image.Exif:
    exif = Image.Exif()
    exif[0x0112] = orientation
    return exif


def test_table_helper_sanity():
    # Value 6 is the common "camera turned clockwise": upright = stored rotated 90 deg clockwise.
    stored = ramp_rgb(6, 4)
    np.testing.assert_array_equal(upright_from_table(stored, 6), np.rot90(stored, -1))
    np.testing.assert_array_equal(upright_from_table(stored, 8), np.rot90(stored, 1))


@pytest.mark.parametrize("value", range(1, 9))
def test_orientation_png_exact(tmp_path, value):
    stored = ramp_rgb(48, 32)
    path = save(tmp_path, "o.png", Image.fromarray(stored), "PNG", exif=exif_with(value))
    result = open_image(path)
    want = upright_from_table(stored, value)
    np.testing.assert_array_equal(np.asarray(result.image), want)
    assert (result.height, result.width) == want.shape[:2]


@pytest.mark.parametrize("value", range(1, 9))
def test_orientation_jpeg_matches_its_table_entry_best(tmp_path, value):
    stored = ramp_rgb(64, 48)
    path = tmp_path / "o.jpg"
    path.write_bytes(jpeg_bytes(stored, exif=exif_with(value)))
    got = np.asarray(open_image(path).image)
    distances = {v: mad(got, upright_from_table(stored, v)) for v in ORIENTATION_TABLE
                 if upright_from_table(stored, v).shape == got.shape}
    assert min(distances, key=distances.get) == value
    assert distances[value] < 3  # JPEG noise on a smooth ramp (common practice)


def exif_orientation_as_text() -> bytes:
    # Exif uses the TIFF 6.0 layout: 'MM', 42, IFD offset 8; one 12-byte entry
    # for tag 0x0112 typed ASCII (2) instead of SHORT, 4 bytes inline.
    return (b"Exif\x00\x00MM\x00\x2a" + struct.pack(">I", 8) + struct.pack(">H", 1)
            + struct.pack(">HHI", 0x0112, 2, 4) + b"six\x00" + struct.pack(">I", 0))


@pytest.mark.parametrize("bad", [0, 9, 65535, "ascii"])
def test_broken_orientation_treated_as_1(tmp_path, bad):
    stored = ramp_rgb(24, 16)
    exif = exif_orientation_as_text() if bad == "ascii" else exif_with(bad)
    path = save(tmp_path, "bad.png", Image.fromarray(stored), "PNG", exif=exif)
    with Image.open(path) as check:  # the broken value really is in the file
        assert check.getexif().get(0x0112) == ("six" if bad == "ascii" else bad)
    result = open_image(path)
    np.testing.assert_array_equal(np.asarray(result.image), stored)
    assert (result.width, result.height) == (24, 16)


# Pillow warns about the corrupt block while opening; decoding goes on
# under the default filters, so a project-wide "error" filter must not apply here.
@pytest.mark.filterwarnings("ignore:Corrupt EXIF data:UserWarning")
def test_garbage_exif_block_does_not_crash(tmp_path):
    data = with_jpeg_segment(jpeg_bytes(blocks_rgb()), 0xE1, b"Exif\x00\x00" + b"MM\x00*\xff\xff\xff\xff" + b"\x07" * 40)
    result = open_image(data)
    assert result.image.size == (64, 32)
    assert result.metadata["captured_at"] is None and result.metadata["camera"] is None


# --------------------------------------------------------------------------
# refusals


def header_only_png(width: int, height: int) -> bytes:
    """A PNG whose IHDR declares a size but carries no pixel data."""
    return PNG_SIGNATURE + png_ihdr(width, height) + png_chunk(b"IEND", b"")


def test_decompression_bomb_header_refused():
    with pytest.raises(DecodeError) as info:
        open_image(header_only_png(50_000, 50_000))
    assert "pixels" in info.value.reason


def test_pixel_limit_checked_before_decoding():
    # 9000x9000 = 81 M pixels: under Pillow's own thresholds, over ours.  If
    # pixels were decoded first the failure would be 'corrupt', not the limit.
    with pytest.raises(DecodeError) as info:
        open_image(header_only_png(9000, 9000), max_pixels=80_000_000)
    assert "9000x9000" in info.value.reason and "limit" in info.value.reason
    with pytest.raises(DecodeError) as info:
        open_image(header_only_png(9000, 9000))
    assert "limit" not in info.value.reason


def test_pixel_limit_boundary(tmp_path):
    path = save(tmp_path, "c.png", Image.new("RGB", (100, 100), (1, 2, 3)), "PNG")
    assert open_image(path, max_pixels=10_000).width == 100
    with pytest.raises(DecodeError):
        open_image(path, max_pixels=9_999)


def test_pillow_bomb_warning_as_error_becomes_decode_error():
    # 95 M pixels: above Pillow's warning threshold (~89.5 M), under ours.
    with warnings.catch_warnings():
        warnings.simplefilter("error", Image.DecompressionBombWarning)
        with pytest.raises(DecodeError) as info:
            open_image(header_only_png(10_000, 9_500))
    assert "too many pixels" in info.value.reason


@pytest.mark.parametrize("kind", ["path", "bytes"])
def test_empty_input(tmp_path, kind):
    path = tmp_path / "empty.jpg"
    path.write_bytes(b"")
    with pytest.raises(DecodeError) as info:
        open_image(path if kind == "path" else b"")
    assert info.value.reason == "the file is empty"


def test_zero_size_png():
    data = PNG_SIGNATURE + png_ihdr(0, 10) + png_chunk(b"IDAT", zlib.compress(b"")) + png_chunk(b"IEND", b"")
    with pytest.raises(DecodeError):
        open_image(data)


def test_truncated_jpeg():
    data = jpeg_bytes(smooth_rgb(256, 192))
    with pytest.raises(DecodeError) as info:
        open_image(data[: len(data) // 2])
    assert "truncated" in info.value.reason


def test_truncated_png(tmp_path):
    path = save(tmp_path, "t.png", Image.fromarray(smooth_rgb(256, 192)), "PNG")
    data = path.read_bytes()
    with pytest.raises(DecodeError) as info:
        open_image(data[: len(data) // 2])
    assert "truncated" in info.value.reason


def test_text_named_jpg(tmp_path):
    path = tmp_path / "notes.jpg"
    path.write_text("these are holiday notes, not a picture\n")
    with pytest.raises(DecodeError) as info:
        open_image(path)
    assert "not an image" in info.value.reason


def test_random_bytes(tmp_path):
    path = tmp_path / "noise.png"
    path.write_bytes(np.random.default_rng(7).bytes(4096))
    with pytest.raises(DecodeError):
        open_image(path)


def test_missing_path_and_folder(tmp_path):
    with pytest.raises(DecodeError) as info:
        open_image(tmp_path / "absent.jpg")
    assert "does not exist" in info.value.reason
    with pytest.raises(DecodeError) as info:
        open_image(tmp_path)
    assert "folder" in info.value.reason


def test_permission_denied_becomes_decode_error(monkeypatch, tmp_path):
    # Tests run as root here, where chmod 000 does not deny reads; shadow open().
    def denied(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(decode, "open", denied, raising=False)
    with pytest.raises(DecodeError) as info:
        open_image(tmp_path / "locked.jpg")
    assert "permission denied" in info.value.reason


@pytest.mark.filterwarnings("ignore::UserWarning")  # Pillow warns about the damage it sees
def test_mutated_files_never_raise_raw(tmp_path):
    """Byte-flipped copies of valid files: Decoded or DecodeError, nothing else."""
    rng = np.random.default_rng(11)
    base = Image.fromarray(smooth_rgb(40, 30))
    for fmt in ["JPEG", "PNG", "GIF", "TIFF", "BMP", "WEBP"]:
        buf = io.BytesIO()
        base.save(buf, fmt)
        original = bytearray(buf.getvalue())
        for _ in range(25):
            mutant = bytearray(original)
            for pos in rng.integers(0, len(mutant), size=4):
                mutant[pos] = int(rng.integers(0, 256))
            try:
                result = open_image(bytes(mutant))
            except DecodeError as exc:
                assert exc.reason
            else:
                assert result.image.mode == "RGB"


# --------------------------------------------------------------------------
# sources and resources


def test_bytes_bytearray_and_file_objects(tmp_path):
    path = save(tmp_path, "s.png", Image.fromarray(blocks_rgb()), "PNG")
    data = path.read_bytes()
    expected = np.asarray(open_image(path).image)
    for source in (data, bytearray(data), memoryview(data), str(path)):
        np.testing.assert_array_equal(np.asarray(open_image(source).image), expected)
    with open(path, "rb") as fh:
        np.testing.assert_array_equal(np.asarray(open_image(fh).image), expected)
        assert not fh.closed  # the caller's file stays the caller's


class OneWayStream(io.RawIOBase):
    """A non-seekable upload stream."""

    def __init__(self, data: bytes):
        self._buf = io.BytesIO(data)

    def readable(self):
        return True

    def seekable(self):
        return False

    def readinto(self, b):
        return self._buf.readinto(b)


def test_non_seekable_stream():
    data = jpeg_bytes(blocks_rgb())
    assert open_image(OneWayStream(data)).format == "JPEG"


@pytest.mark.skipif(not os.path.isdir("/proc/self/fd"), reason="needs /proc to count open files")
def test_file_handles_closed_and_image_loaded(tmp_path):
    good = save(tmp_path, "g.jpg", Image.fromarray(blocks_rgb()), "JPEG")
    bad = tmp_path / "b.jpg"
    bad.write_bytes(good.read_bytes()[:300])
    before = len(os.listdir("/proc/self/fd"))
    result = open_image(good)
    for _ in range(3):
        with pytest.raises(DecodeError):
            open_image(bad)
    assert len(os.listdir("/proc/self/fd")) == before
    # Pixels are usable after the file is gone: the image was fully loaded.
    good.unlink()
    assert result.image.getpixel((8, 16))[0] > 150


# --------------------------------------------------------------------------
# reduced decode


def test_reduced_jpeg_decode(tmp_path):
    path = tmp_path / "big.jpg"
    path.write_bytes(jpeg_bytes(smooth_rgb(2000, 1500)))
    small = open_image(path, min_side=300)
    assert (small.width, small.height) == (2000, 1500)  # full size still reported
    assert small.image.width < 2000 and min(small.image.size) >= 300
    # 1/4 is the largest libjpeg scale whose shorter side (375) is >= 300.
    assert small.image.size == (500, 375)
    full = open_image(path).image.resize(small.image.size, Image.Resampling.BOX)
    # DCT-domain scaling vs box-filtered full decode: within 3 levels on
    # average (sanity tolerance, common practice).
    assert mad(small.image, full) < 3


def test_reduced_png_decode(tmp_path):
    path = save(tmp_path, "big.png", Image.fromarray(smooth_rgb(2000, 1500)), "PNG")
    small = open_image(path, min_side=300)
    assert (small.width, small.height) == (2000, 1500)
    assert small.image.size == (400, 300)  # integer factor 5 keeps the short side at 300
    full = open_image(path).image.resize((400, 300), Image.Resampling.BOX)
    assert mad(small.image, full) < 1


def test_min_side_larger_than_image_keeps_full_size(tmp_path):
    path = tmp_path / "s.jpg"
    path.write_bytes(jpeg_bytes(smooth_rgb(320, 240)))
    assert open_image(path, min_side=1000).image.size == (320, 240)
    assert open_image(path, min_side=200).image.size == (320, 240)  # 240//200 < 2: no reduction


def test_reduced_decode_with_rotation(tmp_path):
    path = tmp_path / "r.jpg"
    path.write_bytes(jpeg_bytes(smooth_rgb(1600, 1200), exif=exif_with(6)))
    result = open_image(path, min_side=250)
    assert (result.width, result.height) == (1200, 1600)
    assert result.image.height > result.image.width and min(result.image.size) >= 250


def test_min_side_must_be_positive():
    with pytest.raises(ValueError):
        open_image(b"x", min_side=0)


# --------------------------------------------------------------------------
# metadata


def exif_block(**tags) -> Image.Exif:
    exif = Image.Exif()
    ifd = exif.get_ifd(0x8769)  # Exif IFD pointer (Exif 2.3)
    for tag, value in tags.items():
        number = int(tag[1:], 16)
        (ifd if number == 0x9003 else exif)[number] = value
    return exif


@pytest.mark.parametrize("fmt,name", [("JPEG", "m.jpg"), ("PNG", "m.png"), ("WEBP", "m.webp")])
def test_exif_date_and_camera(tmp_path, fmt, name):
    # Exif 2.3 tags: Make 0x010F, Model 0x0110 (IFD0); DateTimeOriginal
    # 0x9003 (Exif IFD) as "YYYY:MM:DD HH:MM:SS".
    exif = exif_block(t010F="Fictocam", t0110="Fictocam FC-100", t9003="2021:06:15 08:30:05",
                      t0132="2022:01:01 00:00:00")
    path = save(tmp_path, name, Image.fromarray(blocks_rgb()), fmt, exif=exif)
    meta = open_image(path).metadata
    assert meta["captured_at"] == "2021-06-15T08:30:05"
    assert meta["camera"] == "Fictocam FC-100"  # maker not repeated


def test_exif_fallbacks(tmp_path):
    exif = exif_block(t010F="  Nullpoint Optics\x00", t0110="NP 7 ", t0132="2020:02:29 12:00:00",
                      t010E="Harbour at dawn")
    path = save(tmp_path, "f.jpg", Image.fromarray(blocks_rgb()), "JPEG", exif=exif)
    meta = open_image(path).metadata
    assert meta["captured_at"] == "2020-02-29T12:00:00"  # DateTime 0x0132 when no DateTimeOriginal
    assert meta["camera"] == "Nullpoint Optics NP 7"
    assert meta["title"] == "Harbour at dawn"  # ImageDescription 0x010E is the last title source
    assert meta["keywords"] == []


def test_unknown_date_falls_back_then_none(tmp_path):
    # Exif 2.3: an unknown date may be all blanks (colons kept) - from memory.
    exif = exif_block(t9003="0000:00:00 00:00:00", t0132="2019:12:31 23:59:59")
    path = save(tmp_path, "d.jpg", Image.fromarray(blocks_rgb()), "JPEG", exif=exif)
    assert open_image(path).metadata["captured_at"] == "2019-12-31T23:59:59"
    exif = exif_block(t9003="    :  :     :  :  ")
    path = save(tmp_path, "e.jpg", Image.fromarray(blocks_rgb()), "JPEG", exif=exif)
    assert open_image(path).metadata["captured_at"] is None


def test_no_metadata_gives_all_keys_empty(tmp_path):
    path = save(tmp_path, "plain.png", Image.fromarray(blocks_rgb()), "PNG")
    assert open_image(path).metadata == {"captured_at": None, "camera": None, "title": None, "keywords": []}


def test_xmp_title_and_subject_in_jpeg():
    packet = xmp_packet([("fr", "Le phare"), ("x-default", "The lighthouse")], ["coast", "night", "coast", " "])
    data = with_jpeg_segment(jpeg_bytes(blocks_rgb()), 0xE1, XMP_JPEG_HEADER + packet)
    meta = open_image(data).metadata
    assert meta["title"] == "The lighthouse"  # x-default wins over the first item
    assert meta["keywords"] == ["coast", "night"]  # deduplicated, order kept, blanks dropped


def test_xmp_in_png_itxt_and_tiff_tag(tmp_path):
    packet = xmp_packet([("x-default", "Quiet bay")], ["sea"])
    info = PngImagePlugin.PngInfo()
    info.add_itxt("XML:com.adobe.xmp", packet.decode("utf-8"))  # PNG keyword per XMP Part 3 (from memory)
    png = save(tmp_path, "x.png", Image.fromarray(blocks_rgb()), "PNG", pnginfo=info)
    tif = save(tmp_path, "x.tif", Image.fromarray(blocks_rgb()), "TIFF", tiffinfo={700: packet})  # TIFF tag 700 XMP
    for path in (png, tif):
        meta = open_image(path).metadata
        assert (meta["title"], meta["keywords"]) == ("Quiet bay", ["sea"]), path.name


def iptc_jpeg(iim: bytes, exif: Image.Exif | None = None) -> bytes:
    extra = {"exif": exif} if exif is not None else {}
    return with_jpeg_segment(jpeg_bytes(blocks_rgb(), **extra), 0xED, photoshop_app13(iim))


def test_iptc_in_jpeg_app13():
    # IIM: 2:05 Object Name, 2:25 Keywords (repeatable).
    iim = (iptc_dataset(1, 90, b"\x1b%G")  # coded character set: UTF-8
           + iptc_dataset(2, 5, "Fjord crossing".encode())
           + iptc_dataset(2, 25, b"ferry") + iptc_dataset(2, 25, "fjörd".encode())
           + iptc_dataset(2, 25, b"ferry"))
    meta = open_image(iptc_jpeg(iim, exif_block(t010E="description loses"))).metadata
    assert meta["title"] == "Fjord crossing"  # IPTC beats ImageDescription (kinscope's own order, see below)
    assert meta["keywords"] == ["ferry", "fjörd"]


def test_iptc_in_tiff_tag(tmp_path):
    iim = iptc_dataset(2, 5, b"Quarry") + iptc_dataset(2, 25, b"stone")
    path = save(tmp_path, "i.tif", Image.fromarray(blocks_rgb()), "TIFF", tiffinfo={33723: iim})  # IPTC-NAA tag
    meta = open_image(path).metadata
    assert (meta["title"], meta["keywords"]) == ("Quarry", ["stone"])


def test_xmp_beats_iptc():
    # The title order XMP > IPTC > EXIF is index/images/decode.py's own policy (the newest, richest source
    # first), not a rule of any of the three standards.
    iim = iptc_dataset(2, 5, b"iptc title") + iptc_dataset(2, 25, b"iptc word")
    data = iptc_jpeg(iim)
    data = with_jpeg_segment(data, 0xE1, XMP_JPEG_HEADER + xmp_packet([("x-default", "xmp title")], ["xmp word"]))
    meta = open_image(data).metadata
    assert (meta["title"], meta["keywords"]) == ("xmp title", ["xmp word"])


def test_iptc_extended_length_dataset():
    # IIM extended DataSet: high bit of the length set, low bits = byte count of the real length.
    value = b"Long name"
    extended = bytes([0x1C, 2, 5]) + struct.pack(">H", 0x8004) + struct.pack(">I", len(value)) + value
    assert metadata._iim_records(extended) == {(2, 5): [value]}


def test_malformed_xmp_tolerated_and_other_sources_still_used():
    iim = iptc_dataset(2, 5, b"Fallback title") + iptc_dataset(2, 25, b"kept")
    data = with_jpeg_segment(iptc_jpeg(iim), 0xE1, XMP_JPEG_HEADER + b"<x:xmpmeta><rdf:RDF><broken")
    meta = open_image(data).metadata
    assert (meta["title"], meta["keywords"]) == ("Fallback title", ["kept"])


def test_xmp_with_entities_is_refused():
    packet = (b'<?xml version="1.0"?><!DOCTYPE x [<!ENTITY t "injected">]>'
              + xmp_packet([("x-default", "&t;")], ["&t;"]).split(b"?>", 1)[1])
    data = with_jpeg_segment(jpeg_bytes(blocks_rgb()), 0xE1, XMP_JPEG_HEADER + packet)
    meta = open_image(data).metadata
    assert meta["title"] is None and meta["keywords"] == []


def test_truncated_iptc_keeps_complete_datasets():
    iim = iptc_dataset(2, 5, b"Harbour") + iptc_dataset(2, 25, b"boats", declared=200)
    meta = open_image(iptc_jpeg(iim)).metadata
    assert (meta["title"], meta["keywords"]) == ("Harbour", [])


def test_iptc_garbage_tolerated():
    meta = open_image(iptc_jpeg(b"\x1c\x02")).metadata
    assert meta["title"] is None and meta["keywords"] == []


def test_read_metadata_on_unloaded_and_in_memory_images(tmp_path):
    exif = exif_block(t010F="Fictocam", t9003="2018:03:04 05:06:07")
    path = save(tmp_path, "u.jpg", Image.fromarray(blocks_rgb()), "JPEG", exif=exif)
    with Image.open(path) as img:
        assert read_metadata(img)["captured_at"] == "2018-03-04T05:06:07"
    assert read_metadata(Image.new("RGB", (2, 2))) == {
        "captured_at": None, "camera": None, "title": None, "keywords": []}
