"""A generated corpus of bad and odd files; each entry says whether it should index or fail."""
from __future__ import annotations

import io
import os
import struct
import zlib
from pathlib import Path

import numpy as np
from PIL import Image


def _rgb(w, h, seed=0):
    rng = np.random.default_rng(seed)
    return Image.fromarray(rng.integers(0, 255, (h, w, 3), dtype=np.uint8))


def _bytes(image: Image.Image, fmt: str, **kw) -> bytes:
    buf = io.BytesIO()
    image.save(buf, fmt, **kw)
    return buf.getvalue()


def _png_chunk(kind: bytes, body: bytes) -> bytes:
    # PNG (ISO/IEC 15948, W3C): length, type, data, CRC-32 over type and data.
    return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body) & 0xFFFFFFFF)


def bomb_png(width=50_000, height=50_000) -> bytes:
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", ihdr) + _png_chunk(b"IDAT", zlib.compress(b"\0" * 64)) + _png_chunk(b"IEND", b"")


def build(root: Path) -> dict[str, str]:
    """Write the corpus below root; returns relative path -> 'ok' (must index) or 'fail' (must be recorded)."""
    root.mkdir(parents=True, exist_ok=True)
    expect: dict[str, str] = {}

    def put(name: str, data: bytes, outcome: str) -> None:
        (root / name).parent.mkdir(parents=True, exist_ok=True)
        (root / name).write_bytes(data)
        expect[name] = outcome

    base = _rgb(320, 240, 1)
    jpeg, png, webp, tiff = (_bytes(base, f) for f in ("JPEG", "PNG", "WEBP", "TIFF"))
    # Odd but valid: every one must be indexed.
    put("odd/one-pixel.png", _bytes(_rgb(1, 1), "PNG"), "ok")
    put("odd/wide-20000x20.png", _bytes(_rgb(20000, 20), "PNG"), "ok")
    put("odd/tall-20x20000.png", _bytes(_rgb(20, 20000), "PNG"), "ok")
    gray16 = Image.fromarray((np.arange(256 * 64, dtype=np.uint16).reshape(64, 256) * 4).astype(np.uint16))
    put("odd/gray-16bit.png", _bytes(gray16, "PNG"), "ok")
    put("odd/gray-16bit.tif", _bytes(gray16, "TIFF"), "ok")
    put("odd/cmyk.jpg", _bytes(base.convert("CMYK"), "JPEG"), "ok")
    put("odd/cmyk.tif", _bytes(base.convert("CMYK"), "TIFF"), "ok")
    put("odd/palette.png", _bytes(base.convert("P"), "PNG"), "ok")
    pal = base.convert("P")
    put("odd/palette-transparent.png", _bytes(pal, "PNG", transparency=0), "ok")
    put("odd/gray-alpha.png", _bytes(base.convert("LA"), "PNG"), "ok")
    put("odd/rgba.png", _bytes(base.convert("RGBA"), "PNG"), "ok")
    put("odd/one-bit.bmp", _bytes(base.convert("1"), "BMP"), "ok")
    put("odd/progressive.jpg", _bytes(base, "JPEG", progressive=True), "ok")
    put("odd/grayscale.jpg", _bytes(base.convert("L"), "JPEG"), "ok")
    put("odd/lossless.webp", _bytes(base, "WEBP", lossless=True), "ok")
    put("odd/lzw.tif", _bytes(base, "TIFF", compression="tiff_lzw"), "ok")
    frames = [_rgb(64, 48, s).convert("P") for s in range(4)]
    buf = io.BytesIO()
    frames[0].save(buf, "GIF", save_all=True, append_images=frames[1:], duration=100, loop=0)
    put("odd/animated.gif", buf.getvalue(), "ok")
    buf = io.BytesIO()
    _rgb(64, 48, 7).save(buf, "TIFF", save_all=True, append_images=[_rgb(64, 48, 8), _rgb(64, 48, 9)])
    put("odd/multipage.tif", buf.getvalue(), "ok")
    for value in (0, 9, 65535):  # orientation values outside Exif 2.3's 1..8
        exif = Image.Exif()
        exif[0x0112] = value
        put(f"odd/orientation-{value}.jpg", _bytes(base, "JPEG", exif=exif.tobytes()), "ok")
    put("odd/png-named.jpg", png, "ok")  # the content decides, not the extension
    put("odd/jpeg-named.png", jpeg, "ok")
    put("odd/webp-named.tiff", webp, "ok")
    put("odd/name with spaces.jpg", jpeg, "ok")
    put("odd/\U0001f9f5 thread \u00e9t\u00e9.png", png, "ok")
    put("odd/large-4000x3000.jpg", _bytes(_rgb(4000, 3000, 5), "JPEG", quality=70), "ok")

    # Broken: every one must be recorded as failed, with its reason.
    for ext in ("jpg", "png", "webp", "tif", "gif", "bmp"):
        put(f"bad/zero-bytes.{ext}", b"", "fail")
    for frac in (0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9):
        put(f"bad/truncated-{int(frac * 100)}.jpg", jpeg[: int(len(jpeg) * frac)], "fail")
        put(f"bad/truncated-{int(frac * 100)}.png", png[: int(len(png) * frac)], "fail")
    for frac in (0.1, 0.3, 0.5, 0.7, 0.9):
        put(f"bad/truncated-{int(frac * 100)}.webp", webp[: int(len(webp) * frac)], "fail")
        put(f"bad/truncated-{int(frac * 100)}.tif", tiff[: int(len(tiff) * frac)], "fail")
    for i in range(6):
        put(f"bad/text-{i}.jpg", f"This is note {i}, not a picture.\n".encode() * 20, "fail")
    rng = np.random.default_rng(42)
    for i, ext in enumerate(["jpg", "png", "webp", "tif", "gif", "bmp", "jpeg", "heic", "jpg", "png"]):
        put(f"bad/random-{i}.{ext}", rng.integers(0, 256, 2000, dtype=np.uint8).tobytes(), "fail")
    gif, bmp = _bytes(base.convert("P"), "GIF"), _bytes(base, "BMP")
    for frac in (0.2, 0.5, 0.8):
        put(f"bad/truncated-{int(frac * 100)}.gif", gif[: int(len(gif) * frac)], "either")  # GIF may decode partly
        put(f"bad/truncated-{int(frac * 100)}.bmp", bmp[: int(len(bmp) * frac)], "fail")
    for ext in ("jpeg", "heic", "tiff"):
        put(f"bad/zero-bytes.{ext}", b"", "fail")
    put("bad/heif-brand-garbage.heic", b"\0\0\0\x18ftypheic" + b"\x00" * 200, "fail")
    put("bad/bomb-50000x50000.png", bomb_png(), "fail")
    put("bad/png-header-only.png", png[:33], "fail")
    corrupt_png = bytearray(png)
    corrupt_png[60:80] = b"\xff" * 20  # inside the first IDAT: the CRC no longer matches
    put("bad/corrupt-crc.png", bytes(corrupt_png), "fail")
    # Damaged JPEG data: decoders may recover some of these with visible garbage; either outcome is
    # acceptable as long as the file is accounted for.
    for i in range(8):
        damaged = bytearray(jpeg)
        for pos in np.random.default_rng(i).integers(600, len(jpeg) - 10, 12):
            damaged[pos] = (damaged[pos] + 97) % 256
        put(f"bad/damaged-{i}.jpg", bytes(damaged), "either")

    # Things that are not plain files.
    (root / "links").mkdir()
    os.symlink("..", root / "links" / "loop")  # a folder symlink loop: must not be followed
    os.symlink("does-not-exist.jpg", root / "links" / "dangling.jpg")
    expect["links/dangling.jpg"] = "fail"
    (root / "links" / "folder.jpg").mkdir()  # a folder with an image name
    non_utf8 = os.fsencode(str(root / "odd")) + b"/latin1-\xe9t\xe9.jpg"
    with open(non_utf8, "wb") as fh:
        fh.write(jpeg)
    expect["odd/latin1-\\xe9t\\xe9.jpg"] = "fail"  # reported by name, with the bytes escaped
    return expect
