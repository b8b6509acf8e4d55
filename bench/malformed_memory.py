"""Benchmark: peak memory while the engine rejects a large malformed file.

    python bench/malformed_memory.py [--sizes 50 400]   (megabytes)

Writes a truncated COCO-style predictions file (a valid split beside it) of each size
and loads it with ``load_predictions`` in a fresh process, reading that process's peak
resident memory (``ru_maxrss``). Detections are read in slices of a few MB, so the
peak stays flat as the file grows (the error is the truncation, found at the end).
For comparison, the same for a truncated ground-truth file: it is memory-mapped and
scanned for syntax before any record is decoded (``msgspec.Raw``), so no objects are
built, but the mapped file pages count in the resident set (page cache, reclaimable):
its peak is about the file size (it was about four times the file size before).
Fails (exit 1) if the predictions peak grows by more than 64 MB from the smallest to
the largest file.
"""

import argparse
import json
import os
import pathlib
import subprocess
import sys
import tempfile

ROOT = pathlib.Path(__file__).resolve().parent.parent
MB = 1024 * 1024

CHILD = """
import resource, sys
sys.path.insert(0, {root!r})
from evaluation.engine import InputError, load_predictions, load_truth
try:
    if {kind!r} == "predictions":
        load_predictions({path!r}, load_truth({truth!r}))
    else:
        load_truth({path!r})
    print("no error")
except InputError as e:
    print("rejected:", e.message)
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss // 1024)
"""

DET = '{"image_id": 1, "category_id": 1, "bbox": [10.5, 20.25, 30.0, 40.0], "score": 0.5},\n'
ANN = (
    '{"id": %d, "image_id": 1, "category_id": 1, "bbox": [10.5, 20.25, 30.0, 40.0], '
    '"area": 1200.0, "iscrowd": 0},\n'
)


def write_truncated(path, megabytes, kind):
    target = megabytes * MB
    with open(path, "w") as f:
        if kind == "predictions":
            f.write("[\n")
            block = DET * 10_000
            while f.tell() < target:
                f.write(block)
        else:
            f.write('{"images": [{"id": 1, "width": 640, "height": 480}], ')
            f.write('"categories": [{"id": 1, "name": "pedestrian"}], "annotations": [\n')
            n = 1
            while f.tell() < target:
                f.write("".join(ANN % (n + i) for i in range(10_000)))
                n += 10_000
        # no closing bracket: truncated


def measure(kind, path, truth):
    code = CHILD.format(root=str(ROOT), kind=kind, path=str(path), truth=str(truth))
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    ).stdout.split("\n")
    return out[0], int(out[1])


def main(argv=None):
    parser = argparse.ArgumentParser()
    parser.add_argument("--sizes", type=int, nargs="+", default=[50, 400])
    args = parser.parse_args(argv)
    peaks = {}
    with tempfile.TemporaryDirectory() as work:
        truth = os.path.join(work, "truth.json")
        pathlib.Path(truth).write_text(
            json.dumps(
                {
                    "images": [{"id": 1, "width": 640, "height": 480}],
                    "annotations": [],
                    "categories": [{"id": 1, "name": "pedestrian"}],
                }
            )
        )
        print(f"{'file':<12} {'MB':>6} {'peak RSS MB':>12}  outcome")
        for kind in ("predictions", "truth"):
            for size in args.sizes:
                path = os.path.join(work, f"{kind}-{size}.json")
                write_truncated(path, size, kind)
                outcome, peak = measure(kind, path, truth)
                os.remove(path)
                peaks[kind, size] = peak
                print(f"{kind:<12} {size:>6} {peak:>12}  {outcome}")
    growth = peaks["predictions", max(args.sizes)] - peaks["predictions", min(args.sizes)]
    print(f"predictions: peak grows {growth} MB from {min(args.sizes)} to {max(args.sizes)} MB")
    return 0 if growth <= 64 else 1


if __name__ == "__main__":
    sys.exit(main())
