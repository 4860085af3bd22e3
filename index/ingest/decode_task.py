"""What one archive file gives the indexer: content hash, metadata, and the network's input pixels.

Torch-free, so decode worker processes start fast and stay small. Failures come back as a reason
(a dict with "error"), never as an exception: one bad file must cost one file, not the run.
"""
from __future__ import annotations

import hashlib
import os
import threading
import warnings

from ..images.decode import DecodeError, open_image
from ..images.preprocess import decode_side, fit_square


def read_file(path: str, size: int) -> dict:
    """{"pixels": (size, size, 3) uint8, "row": catalog fields} or {"error": reason, "size", "mtime"}.

    The decoder's warnings (Pillow's DecompressionBombWarning, "Corrupt EXIF data", ...) are kept out
    of the terminal and added to the reason when the file fails."""
    if threading.current_thread() is not threading.main_thread():  # catch_warnings is process-wide
        return _read_file(path, size)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = _read_file(path, size)
    said = list(dict.fromkeys(str(w.message).strip() for w in caught))
    if "error" in result and said:
        result["error"] += f" (the decoder warned: {'; '.join(said)[:300]})"
    return result


def _read_file(path: str, size: int) -> dict:
    try:
        with open(path, "rb") as fh:
            data = fh.read()
        st = os.stat(path)
    except OSError as exc:
        return {"error": f"cannot read file: {exc.strerror or exc}"}
    try:
        # Reduced-size decoding: JPEG draft mode (libjpeg scales 1/2, 1/4, 1/8) or Image.reduce,
        # never below decode_side(size). Archive.query_image decodes queries the same way.
        decoded = open_image(data, min_side=decode_side(size))
        pixels = fit_square(decoded.image, size)
    except DecodeError as exc:
        return {"error": exc.reason, "size": st.st_size, "mtime": st.st_mtime}
    except Exception as exc:  # a decoder bug must cost one file, not the night's run
        return {"error": f"could not decode: {type(exc).__name__}: {exc}", "size": st.st_size, "mtime": st.st_mtime}
    meta = decoded.metadata
    return {
        "pixels": pixels,
        "row": {
            "sha256": hashlib.sha256(data).hexdigest(),
            "width": decoded.width,
            "height": decoded.height,
            "format": decoded.format,
            "captured_at": meta.get("captured_at"),
            "camera": meta.get("camera"),
            "title": meta.get("title"),
            "keywords": meta.get("keywords") or [],
        },
    }
