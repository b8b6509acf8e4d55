"""Benchmark: Benchbook's engine against pycocotools and faster-coco-eval, one run.

    python bench/engine_vs_reference.py [--images 5000 --detections 500000 --classes 80]

Generates a seeded split (bench/synthetic_split.py), then runs each contender in a
fresh process — parse + evaluate, as a user would call it — and reports wall time,
peak RSS and the ratios. Our engine is also timed loading from its columnar cache.
Fails (exit 1) if any of the 12 COCO numbers differs from pycocotools by > 1e-9, or
if a target is missed: >= 20x pycocotools, >= 3x faster-coco-eval, <= 1 s from the
cache, peak RSS <= 1 GB.
"""

import argparse
import contextlib
import io
import json
import os
import pathlib
import resource
import subprocess
import sys
import time

ROOT = pathlib.Path(__file__).resolve().parent.parent
OUT = ROOT / "bench" / "out"


_CPU = []  # the child's CPU seconds (time.process_time) of the timed part


def _peak_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def run_ours(gt, dt, cache=None):
    sys.path.insert(0, str(ROOT))
    from evaluation.engine import COCO_SUMMARY_KEYS, evaluate, load_predictions, load_truth

    start, cpu = time.perf_counter(), time.process_time()
    truth = load_truth(gt, cache_dir=cache)
    predictions = load_predictions(dt, truth, cache_dir=cache)
    result = evaluate(truth, predictions, "coco")
    elapsed = time.perf_counter() - start
    _CPU.append(time.process_time() - cpu)
    stats = [
        -1.0 if result["summary"][k] is None else result["summary"][k] for k in COCO_SUMMARY_KEYS
    ]
    return elapsed, stats


def _reference(module_coco, module_eval, gt, dt):
    start, cpu = time.perf_counter(), time.process_time()
    with contextlib.redirect_stdout(io.StringIO()):
        coco_gt = module_coco(str(gt))
        coco_dt = coco_gt.loadRes(str(dt))
        evaluator = module_eval(coco_gt, coco_dt, "bbox")
        evaluator.evaluate()
        evaluator.accumulate()
        evaluator.summarize()
    _CPU.append(time.process_time() - cpu)
    return time.perf_counter() - start, [float(s) for s in evaluator.stats[:12]]


def run_pycocotools(gt, dt):
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    return _reference(COCO, COCOeval, gt, dt)


def run_faster(gt, dt):
    from faster_coco_eval import COCO, COCOeval_faster

    return _reference(COCO, COCOeval_faster, gt, dt)


CONTENDERS = {
    "benchbook": lambda gt, dt: run_ours(gt, dt),
    "benchbook (cache)": lambda gt, dt: run_ours(gt, dt, cache=str(OUT / "cache")),
    "pycocotools": run_pycocotools,
    "faster-coco-eval": run_faster,
}


def child(name, gt, dt):
    elapsed, stats = CONTENDERS[name](gt, dt)
    print(json.dumps({"seconds": elapsed, "cpu": _CPU[-1], "peak_mb": _peak_mb(), "stats": stats}))


def spawn(name, gt, dt):
    out = subprocess.run(
        [sys.executable, __file__, "--child", name, str(gt), str(dt)],
        check=True,
        capture_output=True,
        text=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    sys.path.insert(0, str(ROOT))
    from bench.synthetic_split import size_arguments, write_fresh

    size_arguments(parser, images=5000, detections=500_000, classes=80, seed=7)
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        return child(*args.child)

    gt, dt = write_fresh(OUT, args)
    spawn("benchbook (cache)", gt, dt)  # warm the columnar cache
    before = os.getloadavg()
    rows = {name: spawn(name, gt, dt) for name in CONTENDERS}

    reference = rows["pycocotools"]
    print(
        f"{args.images} images, {args.detections} detections, {args.classes} classes "
        f"(seed {args.seed})\n"
    )
    print(f"load average before: {before}, after: {os.getloadavg()}")
    print(
        f"{'contender':<20} {'seconds':>9} {'CPU s':>7} {'peak MB':>9} {'vs pycocotools':>15} "
        f"{'vs faster-coco-eval':>20} {'max |Δ| vs ref':>15}"
    )
    for name, row in rows.items():
        delta = max(abs(a - b) for a, b in zip(row["stats"], reference["stats"]))
        print(
            f"{name:<20} {row['seconds']:>9.2f} {row['cpu']:>7.2f} {row['peak_mb']:>9.0f} "
            f"{reference['seconds'] / row['seconds']:>14.1f}x "
            f"{rows['faster-coco-eval']['seconds'] / row['seconds']:>19.1f}x {delta:>15.1e}"
        )

    ours, cached = rows["benchbook"], rows["benchbook (cache)"]
    failures = []
    for name in ("benchbook", "benchbook (cache)"):
        delta = max(abs(a - b) for a, b in zip(rows[name]["stats"], reference["stats"]))
        if delta > 1e-9:
            failures.append(f"{name} differs from pycocotools by {delta:.2e}")
    if reference["seconds"] / ours["seconds"] < 20:
        failures.append("less than 20x faster than pycocotools")
    if rows["faster-coco-eval"]["seconds"] / ours["seconds"] < 3:
        failures.append("less than 3x faster than faster-coco-eval")
    if cached["seconds"] > 1.0:
        failures.append("more than 1 s from the columnar cache")
    if max(ours["peak_mb"], cached["peak_mb"]) > 1024:
        failures.append("peak RSS above 1 GB")
    print("\n" + ("targets met" if not failures else "FAILED: " + "; ".join(failures)))
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
