"""What a file says about itself: capture date, camera, title and keywords from EXIF, XMP and IPTC.

read_metadata() never fails: a broken or missing source gives None (or [] for keywords).
"""

from __future__ import annotations

import struct
import xml.etree.ElementTree as ET
from datetime import datetime

from PIL import Image

_EXIF_IFD = 0x8769
_DATETIME_ORIGINAL = 0x9003
_DATETIME = 0x0132
_MAKE, _MODEL, _IMAGE_DESCRIPTION = 0x010F, 0x0110, 0x010E
_TIFF_XMP, _TIFF_IPTC = 700, 33723
_PHOTOSHOP_IPTC = 0x0404
_IPTC_OBJECT_NAME, _IPTC_KEYWORDS = (2, 5), (2, 25)

_DC = "{http://purl.org/dc/elements/1.1/}"
_RDF = "{http://www.w3.org/1999/02/22-rdf-syntax-ns#}"
_XML_LANG = "{http://www.w3.org/XML/1998/namespace}lang"
_XMP_MAX_BYTES = 4 * 1024 * 1024
_DATE_FORMATS = ("%Y:%m:%d %H:%M:%S", "%Y-%m-%d %H:%M:%S",
                 "%Y:%m:%dT%H:%M:%S", "%Y-%m-%dT%H:%M:%S")


def read_metadata(img: Image.Image) -> dict:
    """captured_at, camera, title, keywords; broken sources give None / []."""
    exif = _safe(img.getexif)
    xmp = _safe(lambda: _parse_xmp(_xmp_bytes(img)))
    iptc = _safe(lambda: _iim_records(_iptc_bytes(img))) or {}
    return {
        "captured_at": _safe(lambda: _captured_at(exif)),
        "camera": _safe(lambda: _camera(exif)),
        "title": (_safe(lambda: _xmp_title(xmp))
                  or _first(_iptc_texts(iptc, _IPTC_OBJECT_NAME))
                  or _safe(lambda: _clean(exif.get(_IMAGE_DESCRIPTION)))),
        "keywords": _dedupe(_safe(lambda: _xmp_subjects(xmp))
                            or _iptc_texts(iptc, _IPTC_KEYWORDS)),
    }


def _safe(fn):
    """Run one metadata step; any failure means 'not available'."""
    try:
        return fn()
    except Exception:
        return None


def _clean(value) -> str | None:
    """A tag value as a stripped, whitespace-collapsed string, or None."""
    if isinstance(value, bytes):
        value = _decode_text(value)
    if not isinstance(value, str):
        return None
    value = " ".join(value.replace("\x00", " ").split())
    return value or None


def _decode_text(raw: bytes) -> str:
    # Writers rarely declare a charset; UTF-8 first, Latin-1 never fails.
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError:
        return raw.decode("latin-1")


def _first(items: list[str]) -> str | None:
    return items[0] if items else None


def _dedupe(items) -> list[str]:
    return list(dict.fromkeys(i for i in (items or []) if i))


def _captured_at(exif) -> str | None:
    if exif is None:
        return None
    sub = _safe(lambda: exif.get_ifd(_EXIF_IFD)) or {}
    # Some writers put DateTimeOriginal in IFD0; accept it there too.
    for value in (sub.get(_DATETIME_ORIGINAL), exif.get(_DATETIME_ORIGINAL),
                  exif.get(_DATETIME)):
        parsed = _parse_exif_date(value)
        if parsed:
            return parsed
    return None


def _parse_exif_date(value) -> str | None:
    text = _clean(value)
    for fmt in _DATE_FORMATS if text else ():
        try:
            return datetime.strptime(text[:19], fmt).strftime("%Y-%m-%dT%H:%M:%S")
        except ValueError:
            continue
    return None


def _camera(exif) -> str | None:
    if exif is None:
        return None
    make, model = _clean(exif.get(_MAKE)), _clean(exif.get(_MODEL))
    if not make or not model:
        return make or model
    # Many cameras repeat the maker in the model string.
    if model.lower().startswith(make.lower()):
        return model
    return f"{make} {model}"


def _tiff_tag(img: Image.Image, tag: int):
    tags = getattr(img, "tag_v2", None)
    return tags.get(tag) if tags is not None else None


def _xmp_bytes(img: Image.Image) -> bytes | None:
    for value in (img.info.get("xmp"), img.info.get("XML:com.adobe.xmp"),
                  _tiff_tag(img, _TIFF_XMP)):
        if isinstance(value, str):
            return value.encode("utf-8")
        if isinstance(value, (bytes, bytearray)) and value:
            return bytes(value)
    return None


def _parse_xmp(data: bytes | None):
    """Parse an XMP packet into an Element, or None when absent or unsafe."""
    if not data or len(data) > _XMP_MAX_BYTES:
        return None
    encoding = "utf-16" if data[:2] in (b"\xff\xfe", b"\xfe\xff") else "utf-8"
    text = data.decode(encoding, "replace").strip("\x00 \t\r\n\ufeff")
    # XMP never needs a DTD; refusing one rules out entity expansion attacks.
    if "<!DOCTYPE" in text.upper() or "<!ENTITY" in text.upper():
        return None
    try:
        return ET.fromstring(text)
    except ET.ParseError:
        return _parse_xmpmeta_only(text)


def _parse_xmpmeta_only(text: str):
    # Packets are sometimes followed by junk; retry on the x:xmpmeta element.
    start, end = text.find("<x:xmpmeta"), text.rfind("</x:xmpmeta>")
    if start < 0 or end < start:
        return None
    return ET.fromstring(text[start:end + len("</x:xmpmeta>")])


def _xmp_title(root) -> str | None:
    if root is None:
        return None
    for desc in root.iter(_RDF + "Description"):
        if _clean(desc.get(_DC + "title")):
            return _clean(desc.get(_DC + "title"))
    for title in root.iter(_DC + "title"):
        items = list(title.iter(_RDF + "li"))
        default = [li for li in items if li.get(_XML_LANG, "").lower() == "x-default"]
        for node in default + items + [title]:
            if _clean(node.text):
                return _clean(node.text)
    return None


def _xmp_subjects(root) -> list[str]:
    if root is None:
        return []
    words = [desc.get(_DC + "subject") for desc in root.iter(_RDF + "Description")]
    for subject in root.iter(_DC + "subject"):
        items = list(subject.iter(_RDF + "li"))
        words.extend([li.text for li in items] if items else [subject.text])
    return [w for w in map(_clean, words) if w]


def _iptc_bytes(img: Image.Image) -> bytes | None:
    photoshop = img.info.get("photoshop")
    if isinstance(photoshop, dict) and isinstance(photoshop.get(_PHOTOSHOP_IPTC), bytes):
        return photoshop[_PHOTOSHOP_IPTC]
    value = _tiff_tag(img, _TIFF_IPTC)
    if isinstance(value, bytes):
        return value
    if isinstance(value, tuple) and all(isinstance(v, int) for v in value):
        # Some writers type the tag LONG; re-pack in the file's byte order.
        order = "<" if getattr(img.tag_v2, "prefix", b"MM") == b"II" else ">"
        return struct.pack(f"{order}{len(value)}I", *value)
    return None


def _iim_records(data: bytes | None) -> dict[tuple[int, int], list[bytes]]:
    """Parse IPTC IIM datasets: 0x1C, record, dataset, size, data."""
    records: dict[tuple[int, int], list[bytes]] = {}
    pos = 0
    while data and pos + 5 <= len(data) and data[pos] == 0x1C:
        key = (data[pos + 1], data[pos + 2])
        size = int.from_bytes(data[pos + 3:pos + 5], "big")
        pos += 5
        if size & 0x8000:  # extended dataset: low bits = length of the size field
            width = size & 0x7FFF
            if width > 4:
                break
            size = int.from_bytes(data[pos:pos + width], "big")
            pos += width
        value = data[pos:pos + size]
        if len(value) < size:  # truncated: keep the complete datasets only
            break
        records.setdefault(key, []).append(value)
        pos += size
    return records


def _iptc_texts(records: dict, key: tuple[int, int]) -> list[str]:
    return [t for t in map(_clean, records.get(key, [])) if t]
