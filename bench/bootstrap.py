"""Benchmark: paired bootstrap of AP (coco) between two detectors on one split.

    python bench/bootstrap.py [--images 5000 --detections 500000 --resamples 1000]

Target (issue #5): B = 1000 replicates in <= 30 s on 5,000 images with 500,000
detections per detector. Prints the time of matching (once per detector) and of the
replicates, extrapolated when --resamples is smaller.
"""

import argparse
import json
import os
import pathlib
import sys
import time

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parent.parent
OUT = ROOT / "bench" / "out"
TARGET_SECONDS = 30


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    sys.path.insert(0, str(ROOT))
    from bench.synthetic_split import generate, size_arguments

    size_arguments(parser, images=5000, detections=500_000)
    parser.add_argument("--resamples", type=int, default=1000)
    parser.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    args = parser.parse_args()
    from evaluation.engine import load_predictions, load_truth, match
    from evaluation.engine.bootstrap import compare_ap

    OUT.mkdir(parents=True, exist_ok=True)
    truth, predictions = generate(seed=7, n_images=args.images, detections=args.detections)
    (OUT / "bootstrap-truth.json").write_text(json.dumps(truth))
    # The candidate: the same detector with 5 % of its detections lost and noisier scores.
    rng = np.random.default_rng(8)
    candidate = [
        {**d, "score": round(min(1.0, max(0.0, d["score"] + rng.normal(0, 0.05))), 3)}
        for d in predictions
        if rng.random() > 0.05
    ]
    paths = {
        "baseline": OUT / "bootstrap-baseline.json",
        "candidate": OUT / "bootstrap-candidate.json",
    }
    paths["baseline"].write_text(json.dumps(predictions))
    paths["candidate"].write_text(json.dumps(candidate))
    truth = load_truth(OUT / "bootstrap-truth.json")
    start = time.perf_counter()
    records = {
        name: match(truth, load_predictions(path, truth, unknown_classes="drop"), "coco")
        for name, path in paths.items()
    }
    matched = time.perf_counter() - start
    start = time.perf_counter()
    intervals = compare_ap(
        records["candidate"],
        records["baseline"],
        "coco",
        n_resamples=args.resamples,
        seed=1,
        workers=args.workers,
    )
    elapsed = time.perf_counter() - start
    per_1000 = elapsed / args.resamples * 1000
    mean = intervals["mean"]
    print(
        f"{args.images} images, {args.detections} detections per detector, "
        f"{args.workers} worker processes"
    )
    print(
        f"matching both: {matched:.1f} s; {args.resamples} replicates: {elapsed:.1f} s "
        f"({per_1000:.0f} s per 1000)"
    )
    print(f"mean AP delta {mean.estimate:+.4f}, 95 % interval [{mean.low:+.4f}, {mean.high:+.4f}]")
    ok = per_1000 <= TARGET_SECONDS
    print(
        "target met" if ok else f"FAILED: {per_1000:.0f} s per 1000 replicates > {TARGET_SECONDS} s"
    )
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
