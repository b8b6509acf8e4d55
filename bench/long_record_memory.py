"""Benchmark: peak memory and time while the engine refuses a detections file with one
record longer than ``results_stream.MAX_SLICE_BYTES`` (64 MB).

    python bench/long_record_memory.py [--sizes 80 400]   (megabytes)

Each file is loaded in a fresh process (``load_predictions`` against a one-image
split), which prints its peak resident memory (``ru_maxrss``) and the seconds the
refusal took. Four shapes, each refused as "no record ends within 64 MB":

* ``first, numbers``: the first record's ``bbox`` is one array of ``1.5`` values
  (a comma every 4 bytes: the densest structure a record can have);
* ``first, string``: the first record's ``image_id`` is one long string;
* ``first, string of },``: the string is ``x},x},...``: every ``},`` in it is tried as
  a cut, whose decoding fails at its end inside the string (so more is read);
* ``later, ...``: the same in the second record, after a whole first one (the reader
  then holds a slice with no record boundary: ``results_stream._check_prefix``).

The reader stops at the slice limit, so the peak should not grow with the file, and
should stay a small multiple of the slice (the buffer itself is one slice). Prints the
peaks beside the slice size; no pass/fail (it is a measurement).
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
import resource, sys, time
sys.path.insert(0, {root!r})
from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.loaders import results_stream
truth = load_truth({truth!r})
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss // 1024
start = time.perf_counter()
try:
    load_predictions({path!r}, truth)
    print("no error")
except InputError as e:
    print("rejected:", e.message)
print(time.perf_counter() - start)
print(base, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss // 1024)
print(results_stream.MAX_SLICE_BYTES // (1024 * 1024))
"""

FIRST = '{"image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5},\n'
SHAPES = {
    "numbers": ('{"image_id": 1, "category_id": 1, "score": 0.5, "bbox": [', "1.5,", "1.5]}]"),
    "string": ('{"category_id": 1, "score": 0.5, "image_id": "', "x" * 64, '"}]'),
    "string of },": ('{"category_id": 1, "score": 0.5, "image_id": "', "x}," * 21, '"}]'),
}
CASES = [(where, shape) for where in ("first", "later") for shape in SHAPES]


def write_long_record(path, megabytes, where, shape):
    head, unit, tail = SHAPES[shape]
    block = unit * (MB // len(unit))
    with open(path, "w") as f:
        f.write("[" + (FIRST if where == "later" else "") + head)
        while f.tell() < megabytes * MB:
            f.write(block)
        f.write(tail)


def measure(path, truth):
    code = CHILD.format(root=str(ROOT), path=str(path), truth=str(truth))
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    ).stdout.split("\n")
    base, peak = map(int, out[2].split())
    return out[0], float(out[1]), base, peak, int(out[3])


def main(argv=None):
    parser = argparse.ArgumentParser()
    parser.add_argument("--sizes", type=int, nargs="+", default=[80, 400])
    args = parser.parse_args(argv)
    rows = []
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
        for where, shape in CASES:
            for size in args.sizes:
                path = os.path.join(work, f"{where}-{shape}-{size}.json")
                write_long_record(path, size, where, shape)
                rows.append((where, shape, size, *measure(path, truth)))
                os.remove(path)
    slice_mb = rows[0][-1]
    print(f"slice limit (results_stream.MAX_SLICE_BYTES): {slice_mb} MB")
    print("record, shape           | file MB | peak RSS MB | of it before the load | seconds")
    for where, shape, size, outcome, seconds, base, peak, _ in rows:
        print(
            f"{where + ', ' + shape:<24}| {size:>7} | {peak:>11} | {base:>21} | {seconds:7.2f}"
            f"   ({outcome})"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
