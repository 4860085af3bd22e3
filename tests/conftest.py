"""Shared fixtures. Test images come from packages (scikit-image, scikit-learn) or are generated here."""
from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

# scikit-image's bundled images that need no download (skimage.data; those needing `pooch` are left out)
SKIMAGE_NAMES = ("astronaut", "camera", "chelsea", "coffee", "rocket", "coins", "moon", "page", "text",
                 "horse", "hubble_deep_field", "immunohistochemistry", "retina", "colorwheel", "brick",
                 "grass", "gravel", "cell", "clock", "logo", "microaneurysms", "checkerboard")  # `cat` is the same photograph as `chelsea`


def _to_rgb(a: np.ndarray) -> Image.Image:
    if a.dtype == bool:
        a = a.astype(np.uint8) * 255
    if a.dtype != np.uint8:
        a = (255 * (a - a.min()) / (np.ptp(a) + 1e-9)).astype(np.uint8)
    return Image.fromarray(a).convert("RGB")


@pytest.fixture(scope="session", autouse=True)
def model_cache(tmp_path_factory):
    """A per-user model cache of the test session's own (index.model.model_cache): nothing read from or
    written to the real one. Child processes inherit it through the environment."""
    import os

    from index.model.model_cache import ENV

    folder = tmp_path_factory.mktemp("user-cache")
    before = os.environ.get(ENV)
    os.environ[ENV] = str(folder)
    yield folder
    if before is None:
        os.environ.pop(ENV, None)
    else:
        os.environ[ENV] = before


@pytest.fixture(scope="session")
def sample_images() -> dict[str, Image.Image]:
    """Open photographs and scans shipped by scikit-image and scikit-learn, as RGB images."""
    from skimage import data
    from sklearn.datasets import load_sample_images

    images = {}
    for name in SKIMAGE_NAMES:
        images[name] = _to_rgb(getattr(data, name)())
    for path, array in zip(load_sample_images().filenames, load_sample_images().images):
        images["sklearn-" + path.split("/")[-1].split(".")[0]] = Image.fromarray(array)
    return images


@pytest.fixture(scope="session")
def lite0():
    """The default backbone with its packaged weights, loaded once."""
    from index.model.backbones import get_backbone

    backbone = get_backbone()
    return backbone, backbone.load()


@pytest.fixture(scope="session")
def sample_archive(tmp_path_factory, sample_images):
    """An archive indexed from the package sample images (PNG files in a folder)."""
    from index.api import Archive

    root = tmp_path_factory.mktemp("samples")
    folder = root / "archive"
    folder.mkdir()
    for name, image in sample_images.items():
        image.save(folder / f"{name}.png")
    archive = Archive.open(root / "db", create=True)
    archive.add([folder], progress=False)
    return archive, folder
