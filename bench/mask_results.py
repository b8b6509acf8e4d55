"""Benchmark: reading results given as compressed RLE masks, against pycocotools.

    python bench/mask_results.py [--images 1000 --detections 50000 --classes 20]

Writes a seeded split (bench/synthetic_split.py) and its detections twice: once with
boxes, once as rectangular masks in compressed RLE with no ``bbox`` (``loadRes``'s mask
reading: each result's area is its mask's, its box the mask's ``toBbox``). Each
contender runs in a fresh process — parse + evaluate (COCO, bbox) — and the table
prints wall time, CPU time, peak RSS and the ratios side by side:

* ``benchbook (masks)`` against ``pycocotools (masks)``, the reference run on the very
  same file (the 12 numbers must agree within 1e-9, or exit 1);
* ``benchbook (masks)`` against ``benchbook (boxes)``: what the mask reading costs.

No target is enforced beyond equality: the ratios are printed to be watched.
"""

import argparse
import json
import os
import pathlib
import sys

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parent.parent
OUT = ROOT / "bench" / "out" / "masks"
sys.path.insert(0, str(ROOT))

from bench import engine_vs_reference as timed  # noqa: E402
from bench.synthetic_split import size_arguments, write_fresh  # noqa: E402


def _rectangle_counts(box, height, width):
    """Uncompressed RLE (column-major runs, zeros first) of the pixels a box covers."""
    x, y, w, h = box
    x0, y0 = int(np.floor(x)), int(np.floor(y))
    x1, y1 = min(width, int(np.ceil(x + w))), min(height, int(np.ceil(y + h)))
    rows, cols = y1 - y0, x1 - x0
    counts = [x0 * height + y0]
    for _ in range(cols - 1):
        counts += [rows, height - rows]
    counts += [rows, (width - x1) * height + height - y1]
    return counts


def write_masks(dt_path, out_path, height, width):
    """The detections of ``dt_path`` as compressed RLE masks without ``bbox``."""
    from pycocotools import mask

    results = []
    for det in json.loads(dt_path.read_text()):
        counts = _rectangle_counts(det.pop("bbox"), height, width)
        rle = mask.frPyObjects({"counts": counts, "size": [height, width]}, height, width)
        det["segmentation"] = {"size": [height, width], "counts": rle["counts"].decode()}
        results.append(det)
    out_path.write_text(json.dumps(results))
    return out_path


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    size_arguments(parser, images=1000, detections=50_000, classes=20, seed=7)
    args = parser.parse_args()

    height, width = 360, 640
    gt, boxes = write_fresh(OUT, args, width=width, height=height)
    masks = write_masks(boxes, OUT / "masks.json", height, width)
    runs = {
        "benchbook (boxes)": timed.spawn("benchbook", gt, boxes),
        "benchbook (masks)": timed.spawn("benchbook", gt, masks),
        "pycocotools (masks)": timed.spawn("pycocotools", gt, masks),
    }
    print(f"{args.images} images, {args.detections} detections (seed {args.seed})")
    print(f"files: boxes {boxes.stat().st_size >> 20} MB, masks {masks.stat().st_size >> 20} MB")
    print(f"load average: {os.getloadavg()}\n")
    reference, ours = runs["pycocotools (masks)"], runs["benchbook (masks)"]
    print(f"{'run':<22} {'seconds':>8} {'CPU s':>7} {'peak MB':>8} {'pycocotools/this':>17}")
    for name, row in runs.items():
        ratio = reference["seconds"] / row["seconds"]
        print(
            f"{name:<22} {row['seconds']:>8.2f} {row['cpu']:>7.2f} {row['peak_mb']:>8.0f} "
            f"{ratio:>16.1f}x"
        )
    cost = ours["seconds"] / runs["benchbook (boxes)"]["seconds"]
    print(f"\nmask reading costs {cost:.1f}x the box file's time")
    delta = max(abs(a - b) for a, b in zip(ours["stats"], reference["stats"]))
    print(f"max |Δ| of the 12 numbers, benchbook (masks) vs pycocotools: {delta:.1e}")
    return 1 if delta > 1e-9 else 0


if __name__ == "__main__":
    sys.exit(main())
