"""Decoding in worker processes: every file accounted for, stuck or crashing decoders abandoned with a
reason, bounded work in flight; reduced-size decoding close to a full decode."""
from __future__ import annotations

import io
import textwrap
import time

import numpy as np
import pytest
from PIL import Image

from index.images.decode import open_image
from index.ingest.decode_pool import DecodePool
from index.ingest.pipeline import Job, run
from index.images.preprocess import fit_square
from index.ingest.decode_task import decode_side, read_file

# A stand-in reader that misbehaves on purpose, by file name: runs in the worker processes.
HOSTILE_READER = textwrap.dedent('''
    import os, signal, time
    from index.ingest.decode_task import read_file as real

    def read_file(path, size):
        name = os.path.basename(path)
        if "hang" in name:
            time.sleep(3600)
        if "crash" in name:
            os.kill(os.getpid(), signal.SIGSEGV)
        if "slow" in name:
            time.sleep(0.3)
        log = os.environ.get("KINSCOPE_TEST_LOG")
        if log:
            with open(log, "a") as fh:
                fh.write(name + "\\n")
        return real(path, size)
''')


@pytest.fixture
def hostile(tmp_path):
    (tmp_path / "hostile_reader.py").write_text(HOSTILE_READER)
    return {"reader": "hostile_reader:read_file", "extra_path": [str(tmp_path)]}


def _images(folder, names, size=(96, 64)):
    folder.mkdir(exist_ok=True)
    rng = np.random.default_rng(0)
    paths = []
    for name in names:
        Image.fromarray(rng.integers(0, 255, (size[1], size[0], 3), dtype=np.uint8)).save(folder / name)
        paths.append(str(folder / name))
    return paths


def test_every_file_comes_back_once_with_pixels_or_a_reason(tmp_path):
    paths = _images(tmp_path / "imgs", [f"{i:03d}.png" for i in range(40)])
    (tmp_path / "imgs" / "broken.jpg").write_bytes(b"not an image")
    paths.append(str(tmp_path / "imgs" / "broken.jpg"))
    with DecodePool(64, workers=2) as pool:
        results = dict(pool.map(paths))
    assert sorted(results) == sorted(paths)
    assert results[paths[-1]]["error"]
    for p in paths[:-1]:
        assert results[p]["pixels"].shape == (64, 64, 3) and results[p]["pixels"].dtype == np.uint8
        # Same pixels as reading in this process (index.ingest.decode_task is the one code path).
        assert np.array_equal(results[p]["pixels"], read_file(p, 64)["pixels"])


def test_a_hanging_decode_is_abandoned_with_a_reason_and_its_worker_replaced(tmp_path, hostile):
    paths = _images(tmp_path / "imgs", ["a.png", "hang.png", "b.png", "c.png", "d.png", "e.png"])
    with DecodePool(64, workers=2, file_timeout=1.0, **hostile) as pool:
        t = time.monotonic()
        results = dict(pool.map(paths))
        elapsed = time.monotonic() - t
        replaced = pool.replaced
    assert sorted(results) == sorted(paths)
    assert "longer than 1 s" in results[paths[1]]["error"]
    assert all("pixels" in results[p] for p in paths if "hang" not in p.rsplit("/", 1)[1])
    assert replaced == 1
    assert elapsed < 60  # the run did not wait for the hour-long sleep (a liveness bound, not a timing)


def test_a_crashing_decoder_costs_only_its_file(tmp_path, hostile):
    paths = _images(tmp_path / "imgs", ["a.png", "crash.png", "b.png", "c.png", "crash2.png", "d.png"])
    with DecodePool(64, workers=2, **hostile) as pool:
        results = dict(pool.map(paths))
        replaced = pool.replaced
    assert sorted(results) == sorted(paths)
    for p in paths:
        if "crash" in p.rsplit("/", 1)[1]:
            assert "crashed" in results[p].get("error", ""), results
            assert "SIGSEGV" in results[p]["error"]
        else:
            assert "pixels" in results[p]
    assert replaced == 2


def test_work_in_flight_is_bounded_while_the_consumer_is_busy(tmp_path, hostile, monkeypatch):
    log = tmp_path / "decoded.log"
    monkeypatch.setenv("KINSCOPE_TEST_LOG", str(log))
    paths = _images(tmp_path / "imgs", [f"{i:03d}.png" for i in range(60)])
    with DecodePool(64, workers=2, prefetch=2, in_flight=6, **hostile) as pool:
        results = pool.map(paths)
        next(results)
        time.sleep(1.5)  # a slow batch: the workers must stop once `in_flight` files wait for us
        decoded_while_busy = len(log.read_text().split())
        rest = list(results)
    assert len(rest) == 59
    assert decoded_while_busy <= 6 + 1


def test_pipeline_records_an_abandoned_file_as_a_failure(tmp_path, lite0, hostile, monkeypatch):
    from index.model.torch_embedder import Embedder
    from index.model.layers import resolve_layers
    import index.ingest.pipeline as pipeline

    backbone, model = lite0
    embedder = Embedder(backbone, model, resolve_layers(backbone, model, ["colour"]))
    paths = _images(tmp_path / "imgs", ["a.png", "hang.png", "b.png"])
    real_pool = pipeline.DecodePool
    monkeypatch.setattr(pipeline, "DecodePool", lambda *a, **k: real_pool(*a, **{**k, **hostile}))
    embedded, failed = [], []
    counts = run([Job(i, p) for i, p in enumerate(paths)], embedder,
                 lambda ids, d, rows, peaks: embedded.extend(ids.tolist()),
                 lambda f: failed.extend(f), lambda: None, batch_size=2, file_timeout=1.0, progress=False)
    assert sorted(embedded) == [0, 2]
    assert [f["job"].id for f in failed] == [1] and "abandoned" in failed[0]["error"]
    assert counts.embedded == 2 and counts.failed == 1 and counts.replaced_workers == 1
    assert counts.peak_rss > 0 and counts.peak_rss_workers > 0


def test_a_reduced_size_decode_gives_nearly_the_full_decode_descriptor(tmp_path, lite0, sample_images):
    """JPEG draft mode (libjpeg's DCT scaling) against a full-size decode of the same file."""
    from index.model.torch_embedder import Embedder
    from index.model.layers import resolve_layers

    backbone, model = lite0
    embedder = Embedder(backbone, model, resolve_layers(backbone, model, list(backbone.default_layers)))
    size = embedder.size
    worst = {}
    for name in ("astronaut", "coffee", "rocket", "sklearn-china", "sklearn-flower"):
        image = sample_images[name]
        photo = image.resize((image.width * 5, image.height * 5), Image.LANCZOS)  # photo-sized, 2000-3200 px
        buf = io.BytesIO()
        photo.save(buf, "JPEG", quality=90)
        path = tmp_path / f"{name}.jpg"
        path.write_bytes(buf.getvalue())
        reduced = open_image(buf.getvalue(), min_side=decode_side(size)).image
        assert max(reduced.size) <= max(photo.size) // 4  # draft mode really decoded at 1/4 or less
        fast = read_file(str(path), size)["pixels"]
        full = fit_square(open_image(buf.getvalue()).image, size)
        d = embedder.embed_pixels(np.stack([fast, full]))[0]
        for layer, v in d.items():
            worst[layer] = max(worst.get(layer, 0.0), 1.0 - float(v[0] @ v[1]))
    # Measured on this set: at most 0.004 (objects), 0.0003 (parts); 0.01 leaves room for other libjpegs.
    assert all(distance < 0.01 for distance in worst.values()), worst


def test_workers_that_cannot_start_stop_the_run_instead_of_failing_files(tmp_path):
    paths = _images(tmp_path / "imgs", ["a.png", "b.png"])
    with DecodePool(64, workers=1, reader="no_such_module_here:read_file") as pool:
        with pytest.raises(RuntimeError, match="cannot start"):
            list(pool.map(paths))
