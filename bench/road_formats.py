"""Benchmark: KITTI label folders and the kitti2d levels, against reference runs.

    python bench/road_formats.py [--images 3769] [--seed 0]

Writes an invented KITTI-style split (``--images`` label files, ~8 objects and ~12
detections each, DontCare regions) as a folder and as COCO-style JSON, then prints:

* loading the folder vs loading the same split as JSON (the reference reader);
* ``evaluate_levels(..., "kitti2d")`` vs the transliterated devkit
  (``tests/engine/oracle.kitti_eval_class``, plain loops like the C++ source) on the
  first 300 images, and the engine alone on all of them.

Ratios only: no target is asserted; the numbers depend on the machine.
"""

import argparse
import pathlib
import sys
import tempfile
import time

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from evaluation.engine import load_predictions, load_truth  # noqa: E402
from evaluation.engine.difficulty import evaluate_levels  # noqa: E402
from tests.engine import label_writers, oracle  # noqa: E402
from tests.engine.test_difficulty import _random_scene, _write  # noqa: E402


def timed(function):
    start = time.perf_counter()
    value = function()
    return value, time.perf_counter() - start


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--images", type=int, default=3769)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    scenes, detections = _random_scene(rng, args.images)
    with tempfile.TemporaryDirectory() as tmp:
        root = pathlib.Path(tmp)
        truth, predictions = _write(root / "gt", scenes, detections)
        classes = list(truth.classes)
        images = {int(i): (1242, 375) for i in truth.image_ids}
        boxes = [
            (
                int(truth.image_ids[truth.box_image[k]]),
                classes[truth.box_class[k]],
                truth.boxes[k].tolist(),
                {},
            )
            for k in range(truth.n_boxes)
        ]
        json_path = label_writers.coco(root / "split.json", images, classes, boxes)
        folder, t_folder = timed(lambda: load_truth(root / "gt", fmt="kitti"))
        _, t_json = timed(lambda: load_truth(json_path))
        print(
            f"load {args.images} label files: {t_folder:.2f} s; same boxes as JSON: "
            f"{t_json:.2f} s; ratio {t_folder / t_json:.1f}"
        )
        _, t_det = timed(lambda: load_predictions(root / "gt_det", folder, fmt="kitti"))
        print(f"load {len(predictions)} detections from label files: {t_det:.2f} s")
        n = min(300, args.images)
        small_truth, small_predictions = _write(root / "small", scenes[:n], detections[:n])
        _, t_engine = timed(lambda: evaluate_levels(small_truth, small_predictions))
        _, t_oracle = timed(
            lambda: [
                oracle.kitti_eval_class(cls, scenes[:n], detections[:n], level)
                for level in range(3)
                for cls in ("car", "pedestrian", "cyclist")
            ]
        )
        print(
            f"kitti2d on {n} images: engine {t_engine:.2f} s, devkit transliteration "
            f"{t_oracle:.2f} s; ratio {t_engine / t_oracle:.2f}"
        )
        result, t_all = timed(lambda: evaluate_levels(truth, predictions))
        print(
            f"kitti2d on {args.images} images ({truth.n_boxes} boxes, {len(predictions)} "
            f"detections): {t_all:.2f} s; moderate AP_R40 {result['headline']:.4f}"
        )


if __name__ == "__main__":
    main()
