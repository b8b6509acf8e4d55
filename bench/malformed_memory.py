"""Benchmark: peak memory while the engine rejects a large malformed file.

    python bench/malformed_memory.py [--sizes 50 400] [--formats json csv]   (megabytes)

Writes malformed COCO-style and CSV files of each size (a valid split beside them)
and loads each in a fresh process, reading that process's peak resident memory
(``ru_maxrss``):

* ``truncated``: predictions and ground truth cut off mid-record (no closing bracket).
  Predictions are read in slices of a few MB; ground truth that does not end like an
  object gets the bounded syntax check (``loaders/json_syntax.py``) before it is ever
  memory-mapped. Both peaks should stay flat as the file grows.
* ``late type error``: a predictions file that ends like an array, with a string score
  in its last record. Up to ``coco_json.VALIDATE_FIRST_BYTES`` (128 MB) its columns
  are built slice by slice before the error (about 56 bytes per detection against
  ~80 bytes of text); a larger file is validated first, keeping no columns: flat.
* ``valid`` (predictions): loaded; past 128 MB the validation pass counts the records
  and the columns are allocated once and filled (about one copy of them).
* ``late syntax error``: ground truth with a syntax error in its last record, found by
  the same bounded check: flat.
* ``late type error`` (ground truth): valid JSON with a string id in its last record.
  The syntax check passes each slice of the record arrays on to a typed decode into
  columns (about 100 bytes per annotation, against ~110 bytes of text); the file is
  never mapped or decoded whole, so the columns plus one slice count.
* ``valid`` (ground truth): the same file without the error, loaded. Past 32 MB the
  syntax-only scan counts each array's records, so the columns are allocated once at
  full length and each slice is written in place: about one copy of the columns
  (smaller files join their slices' columns: briefly two).

CSV (``loaders/csv_tables.py``): detections (``image_id,label,x_min,...,score``)
and a split's boxes table (an images table of one image beside it).

* ``truncated``: the last row cut short (fewer fields than the header);
* ``late type error``: a cell that is no number in the last row;
* ``valid``: loaded.

A table larger than ``csv_tables.VALIDATE_FIRST_BYTES`` (32 MB) is read through
keeping nothing before its columns are kept, so the first two stay flat; the columns
of a valid file (Python strings for ids and labels) are about 4-6 times its text.

Fails (exit 1) if a truncated file's peak grows by more than 64 MB from the smallest
to the largest size.
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
    if {kind!r}.startswith("predictions"):
        load_predictions({path!r}, load_truth({truth!r}))
    else:
        load_truth({path!r}, images={images!r})
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


CASES = {
    ("predictions", "truncated"): "",
    ("predictions", "late type error"): '{"image_id": 1, "category_id": 1, '
    '"bbox": [1, 2, 3, 4], "score": "high"}]\n',
    ("predictions", "valid"): '{"image_id": 1, "category_id": 1, '
    '"bbox": [1, 2, 3, 4], "score": 0.5}]\n',
    ("truth", "truncated"): "",
    ("truth", "late syntax error"): '{"id": 0, "image_id": 1 "category_id": 1}]}\n',
    ("truth", "late type error"): '{"id": "x", "image_id": 1, "category_id": 1, '
    '"bbox": [1, 2, 3, 4]}]}\n',
    ("truth", "valid"): '{"id": 0, "image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4]}]}\n',
    ("predictions CSV", "truncated"): "1,pedestrian,10.5",
    ("predictions CSV", "late type error"): "1,pedestrian,x,20.25,40.5,60.25,0.5\n",
    ("predictions CSV", "valid"): "1,pedestrian,1,2,4,6,0.5\n",
    ("truth CSV", "truncated"): "1,pedestrian,10.5",
    ("truth CSV", "late type error"): "1,pedestrian,x,20.25,40.5,60.25\n",
    ("truth CSV", "valid"): "1,pedestrian,1,2,4,6\n",
}
CSV_ROWS = {
    "predictions CSV": (
        "image_id,label,x_min,y_min,x_max,y_max,score\n",
        "1,pedestrian,10.5,20.25,40.5,60.25,0.5\n",
    ),
    "truth CSV": (
        "image_id,label,x_min,y_min,x_max,y_max\n",
        "1,pedestrian,10.5,20.25,40.5,60.25\n",
    ),
}
IMAGES_CSV = "image_id,width,height\n1,640,480\n"


def write_malformed(path, megabytes, kind, case):
    target = megabytes * MB
    with open(path, "w") as f:
        if kind in CSV_ROWS:
            header, row = CSV_ROWS[kind]
            f.write(header)
            block = row * 10_000
            while f.tell() < target:
                f.write(block)
        elif kind == "predictions":
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
        f.write(CASES[kind, case])  # nothing more for "truncated"


def measure(kind, path, truth, images):
    code = CHILD.format(
        root=str(ROOT), kind=kind, path=str(path), truth=str(truth), images=str(images)
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    ).stdout.split("\n")
    return out[0], int(out[1])


def main(argv=None):
    parser = argparse.ArgumentParser()
    parser.add_argument("--sizes", type=int, nargs="+", default=[50, 400])
    parser.add_argument("--formats", nargs="+", choices=["json", "csv"], default=["json", "csv"])
    args = parser.parse_args(argv)
    cases = [(k, c) for k, c in CASES if ("csv" if k in CSV_ROWS else "json") in args.formats]
    peaks = {}
    with tempfile.TemporaryDirectory() as work:
        images = os.path.join(work, "images.csv")
        pathlib.Path(images).write_text(IMAGES_CSV)
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
        for kind, case in cases:
            for size in args.sizes:
                suffix = "csv" if kind in CSV_ROWS else "json"
                path = os.path.join(work, f"{kind.split()[0]}-{size}.{suffix}")
                write_malformed(path, size, kind, case)
                outcome, peak = measure(kind, path, truth, images)
                os.remove(path)
                peaks[kind, case, size] = (peak, outcome)
    print(f"peak RSS MB while loading          | {' | '.join(f'{s} MB file' for s in args.sizes)}")
    for kind, case in cases:
        row = " | ".join(str(peaks[kind, case, s][0]) for s in args.sizes)
        print(f"{kind + ', ' + case:<35}| {row}   ({peaks[kind, case, args.sizes[-1]][1]})")
    worst = 0
    for kind in sorted({k for k, c in cases if c == "truncated"}):
        growth = peaks[kind, "truncated", max(args.sizes)][0]
        growth -= peaks[kind, "truncated", min(args.sizes)][0]
        print(
            f"{kind}, truncated: peak grows {growth} MB from {min(args.sizes)} MB to "
            f"{max(args.sizes)} MB"
        )
        worst = max(worst, growth)
    return 0 if worst <= 64 else 1


if __name__ == "__main__":
    sys.exit(main())
