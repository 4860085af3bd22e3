"""Network input from an image, in two halves: resize to uint8 pixels (decode workers, no torch) and
normalise a batch to float32 (the inference side). Split so that only 3 bytes a pixel cross processes."""
from __future__ import annotations

import numpy as np
from PIL import Image


def decode_side(size: int) -> int:
    """The smallest shorter side to decode at for a network input of `size`: half as much again, so
    that a real anti-aliased resize always follows the reduced decode (a DCT-scaled decode straight to
    the input size moved late-layer descriptors by a cosine distance of about 0.02)."""
    return size + size // 2


def fit_square(image: Image.Image, size: int) -> np.ndarray:
    """RGB image -> (size, size, 3) uint8: the whole frame resized, no crop (aspect is not kept)."""
    if image.mode != "RGB":
        image = image.convert("RGB")
    resized = image.resize((size, size), Image.BILINEAR, reducing_gap=3.0)
    return np.asarray(resized, np.uint8)


def to_input(pixels: np.ndarray, mean, std) -> np.ndarray:
    """(N, S, S, 3) uint8 -> (N, 3, S, S) float32, scaled to 0..1 then standardised per channel."""
    n, h, w, c = pixels.shape
    assert c == 3, f"expected 3 colour channels, got {c}"
    mean = np.asarray(mean, np.float32).reshape(1, 3, 1, 1)
    std = np.asarray(std, np.float32).reshape(1, 3, 1, 1)
    # One allocation, then in place (the same float32 operations as (x / 255 - mean) / std).
    x = pixels.transpose(0, 3, 1, 2).astype(np.float32, order="C")
    np.divide(x, np.float32(255.0), out=x)
    np.subtract(x, mean, out=x)
    np.divide(x, std, out=x)
    return x
