"""Peak memory of one file read as a decode worker reads it (index.ingest.decode_task.read_file: hash, decode at
reduced size, resize), in a fresh process: VmHWM from /proc, less its value after the imports.

    .venv/bin/python scripts/measure_decode_memory.py                    # this tree
    .venv/bin/python scripts/measure_decode_memory.py --tree /path/to/other/checkout   # side by side

For each test image: the decoder's own estimate (index.images.decode_memory.estimate, when the tree has it)
and the measured growth of the process's peak resident memory over its peak after the imports.
Images: a 16-bit 9950 x 9950 grey PNG (a ramp, 0.2 MB on disk, just under the
100-million-pixel limit), an 8-bit grey PNG and an RGBA PNG of the same size. Takes about a minute.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
from PIL import Image

SIDE = 9950
CHILD = r"""
import json, sys
def hwm():
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) * 1024
import numpy
from PIL import Image
try:
    from index.ingest.decode_task import read_file
except ImportError:  # a tree from before index/ had rooms
    from index.reader import read_file
try:
    from index.images.decode_memory import estimate
except ImportError:
    try:
        from index.decode_memory import estimate
    except ImportError:
        estimate = None
path, min_side = sys.argv[1], int(sys.argv[2])
est = None
if estimate is not None:
    with Image.open(path) as im:
        est = estimate(im, min_side)
base = hwm()
result = read_file(path, 256)  # what a decode worker does with each file (hash, decode, resize)
print(json.dumps({"base": base, "peak": hwm(), "estimate": est, "ok": "pixels" in result}))
"""


def make_images(folder: Path) -> dict[str, Path]:
    ramp = np.linspace(0, 65535, SIDE).astype(np.uint16)
    deep = np.ascontiguousarray(np.broadcast_to(ramp[None, :], (SIDE, SIDE)))  # rows alike: a small file
    out = {"16-bit grey": folder / "grey16.png"}
    Image.fromarray(deep).save(out["16-bit grey"])
    del deep
    grey = np.broadcast_to((np.arange(SIDE) % 256).astype(np.uint8), (SIDE, SIDE))
    out["8-bit grey"] = folder / "grey8.png"
    Image.fromarray(np.ascontiguousarray(grey)).save(out["8-bit grey"])
    rgba = Image.new("RGBA", (SIDE, SIDE), (200, 30, 60, 128))
    out["RGBA"] = folder / "rgba.png"
    rgba.save(out["RGBA"])
    return out


def measure(tree: str, path: Path, min_side: int) -> dict:
    env = {**os.environ, "PYTHONPATH": tree, "OMP_NUM_THREADS": "1"}
    out = subprocess.run([sys.executable, "-c", CHILD, str(path), str(min_side)], env=env, capture_output=True,
                         text=True, check=True, cwd=path.parent)  # (the current folder would come first)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--tree", action="append", default=[], help="another checkout to measure side by side")
    parser.add_argument("--min-side", type=int, default=384, help="for the estimate: what read_file decodes at "
                        "for a 256 input")
    args = parser.parse_args()
    trees = [str(Path(__file__).resolve().parent.parent)] + args.tree
    with tempfile.TemporaryDirectory() as tmp:
        images = make_images(Path(tmp))
        print(f"{'image':<12} {'on disk':>8}  {'tree':<40} {'estimate MB':>11} {'peak growth MB':>14} "
              f"{'process peak MB':>15}")
        for name, path in images.items():
            for tree in trees:
                r = measure(tree, path, args.min_side)
                est = "-" if r["estimate"] is None else f"{r['estimate'] / 1e6:.0f}"
                print(f"{name:<12} {path.stat().st_size / 1e6:>6.2f}MB  {tree[-40:]:<40} {est:>11} "
                      f"{(r['peak'] - r['base']) / 1e6:>14.0f} {r['peak'] / 1e6:>15.0f}")


if __name__ == "__main__":
    main()
