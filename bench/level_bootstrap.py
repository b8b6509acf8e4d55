"""Benchmark: what a significance or tag rule on a level costs (engine/level_samples.py).

    python bench/level_bootstrap.py [--images 3769] [--resamples 1000] [--seed 0]

Writes an invented KITTI-style split (``--images`` label files, ~8 objects and ~12
detections each) and an invented pedestrian split of as many images, then prints side
by side:

* scoring: ``evaluate_levels`` / ``evaluate_setups`` (which now build the samples), the
  samples file's size (the pedestrian split is ``bench/pedestrian.py``'s street split);
* one weighted recomputation of a level (``level_statistic``, every class) against one
  scoring, and a paired bootstrap of ``--resamples`` replicates for the level's mean and
  for one class (``only=``), against the primary protocol's AP bootstrap on the same
  split (``bootstrap.compare_ap`` over COCO-style match records), the reference the
  existing significance rule pays.

CPU seconds of this process (the machine is shared), ratios side by side; no target
is asserted, the numbers depend on the machine.
"""

import argparse
import json
import os
import pathlib
import sys
import tempfile
import time

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench.pedestrian import street  # noqa: E402
from evaluation.engine import get_protocol, load_predictions, load_truth, match  # noqa: E402
from evaluation.engine.bootstrap import compare_ap, paired_bootstrap  # noqa: E402
from evaluation.engine.difficulty import evaluate_levels_with_samples  # noqa: E402
from evaluation.engine.level_samples import level_statistic  # noqa: E402
from evaluation.engine.pedestrian import evaluate_setups_with_samples  # noqa: E402
from tests.engine.test_difficulty import _random_scene, _write  # noqa: E402


def timed(function):
    start = time.process_time()
    value = function()
    return value, time.process_time() - start


def bootstrap(samples, other, level, resamples, only=None):
    return paired_bootstrap(
        lambda w: level_statistic(samples, level, w, only),
        lambda w: level_statistic(other, level, w, only),
        samples.n_images,
        n_resamples=resamples,
    )


def report(name, evaluate, truth, predictions, worse, level, one_class, resamples, root):
    (output, samples), scoring = timed(lambda: evaluate(truth, predictions))
    (_, other), _ = timed(lambda: evaluate(truth, worse))
    path = root / f"{name}.npz"
    samples.save(path, output)
    _, once = timed(lambda: level_statistic(samples, level, np.ones(truth.n_images, np.int64)))
    _, mean_boot = timed(lambda: bootstrap(samples, other, level, resamples))
    _, class_boot = timed(lambda: bootstrap(samples, other, level, resamples, one_class))
    print(f"{name}: {truth.n_images} images, {len(predictions)} detections")
    print(f"  scoring with samples            {scoring:8.2f} s")
    print(f"  samples file                    {os.path.getsize(path) / 1e6:8.2f} MB")
    print(
        f"  one weighted level (all classes){once:8.3f} s   ratio to scoring {once / scoring:.3f}"
    )
    print(f"  bootstrap {resamples} replicates, mean   {mean_boot:8.2f} s")
    print(f"  bootstrap {resamples} replicates, {one_class:<10}{class_boot:8.2f} s")
    return mean_boot


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--images", type=int, default=3769)
    parser.add_argument("--resamples", type=int, default=1000)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    with tempfile.TemporaryDirectory() as tmp:
        root = pathlib.Path(tmp)
        scenes, detections = _random_scene(rng, args.images)
        truth, predictions = _write(root / "gt", scenes, detections)
        thinned = [dets[::2] for dets in detections]
        _, worse = _write(root / "thin", scenes, thinned)
        kitti = report(
            "kitti2d moderate",
            lambda t, p: evaluate_levels_with_samples(t, p, "kitti2d"),
            truth,
            predictions,
            worse,
            "moderate",
            "Car",
            args.resamples,
            root,
        )
        protocol = get_protocol("coco")
        records, matching = timed(lambda: match(truth, predictions, protocol))
        other = match(truth, worse, protocol)
        _, reference = timed(
            lambda: compare_ap(records, other, protocol, n_resamples=args.resamples)
        )
        print(
            f"  reference: AP bootstrap over COCO match records {reference:8.2f} s "
            f"(matching {matching:.2f} s); level mean / reference = {kitti / reference:.2f}"
        )

        truth_dict, results = street(rng, args.images, 8, 40)  # bench/pedestrian.py's split
        gt, dt, thin = root / "walk.json", root / "walk_dt.json", root / "walk_thin.json"
        gt.write_text(json.dumps(truth_dict))
        dt.write_text(json.dumps(results))
        thin.write_text(json.dumps(results[::2]))
        truth = load_truth(gt)
        predictions, worse_walk = load_predictions(dt, truth), load_predictions(thin, truth)
        report(
            "miss-rate reasonable",
            lambda t, p: evaluate_setups_with_samples(t, p, "miss-rate"),
            truth,
            predictions,
            worse_walk,
            "reasonable",
            "pedestrian",
            args.resamples,
            root,
        )


if __name__ == "__main__":
    main()
