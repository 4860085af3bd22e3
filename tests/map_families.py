"""Families of images for the collection map's tests: photographs and scans shipped by scikit-image
(skimage.data, no download) and transformed copies of each made here (a crop, half size, a heavy JPEG
re-encoding, brighter). One family = one source image and its copies."""
from __future__ import annotations

import io
from pathlib import Path

from PIL import Image, ImageEnhance

SOURCES = ("astronaut", "camera", "chelsea", "coffee", "rocket", "coins", "moon", "page", "horse",
           "hubble_deep_field", "immunohistochemistry", "retina", "brick", "grass", "clock")
VARIANTS = ("original", "crop", "half", "jpeg", "bright")


def variant(image: Image.Image, kind: str) -> Image.Image:
    w, h = image.size
    if kind == "crop":
        return image.crop((w // 10, h // 10, w - w // 10, h - h // 10))
    if kind == "half":
        return image.resize((w // 2, h // 2), Image.LANCZOS)
    if kind == "jpeg":
        buf = io.BytesIO()
        image.save(buf, "JPEG", quality=30)
        return Image.open(io.BytesIO(buf.getvalue())).convert("RGB")
    if kind == "bright":
        return ImageEnhance.Brightness(image).enhance(1.25)
    return image


def write_families(folder: Path, images: dict[str, Image.Image], sources=SOURCES, variants=VARIANTS) -> dict[str, str]:
    """Write every source's variants as PNG files into folder; returns file name -> family."""
    folder.mkdir(parents=True, exist_ok=True)
    family = {}
    for name in sources:
        for kind in variants:
            file = f"{name}-{kind}.png"
            variant(images[name], kind).save(folder / file)
            family[file] = name
    return family
