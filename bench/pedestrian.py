"""Benchmark: the pedestrian setups' log-average miss rate, engine against the
transliteration of the toolbox and of the city-scale code (tests/engine/pedestrian_oracle.py).

    python bench/pedestrian.py [--images 2000 --boxes 8 --detections 40 --seed 0]

A seeded street split (pedestrians 15-200 px tall, visibility 0-1, one don't-care
region every tenth image) and one detector's output; each preset scored on all four
setups by the engine, and the same numbers by the transliterations (slow, literal
Python). Prints CPU seconds of this process side by side, their ratio, and whether every
setup's miss rate agrees (rel 1e-12). No target: the engine's speed is recorded here,
never asserted in a test.
"""

import argparse
import json
import pathlib
import sys
import tempfile
import time

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parent.parent
SETUPS = ("reasonable", "small", "heavy", "all")


def street(rng, n_images, boxes, detections):
    images, annotations, regions, results = [], [], [], []
    for i in range(1, n_images + 1):
        images.append({"id": i, "width": 2048, "height": 1024})
        for _ in range(boxes):
            h = float(rng.uniform(15, 200))
            x, y = float(rng.uniform(0, 1900)), float(rng.uniform(0, 800))
            annotations.append(
                {
                    "id": len(annotations) + 1,
                    "image_id": i,
                    "category_id": 1,
                    "bbox": [x, y, 0.41 * h, h],
                    "visibility": round(float(rng.uniform(0, 1)), 2),
                }
            )
            if rng.random() < 0.7:
                results.append(
                    {
                        "image_id": i,
                        "category_id": 1,
                        "bbox": [x + rng.normal(0, 3), y + rng.normal(0, 3), 0.41 * h, h],
                        "score": round(float(rng.random()), 3),
                    }
                )
        for _ in range(detections - boxes):
            h = float(rng.uniform(15, 200))
            results.append(
                {
                    "image_id": i,
                    "category_id": 1,
                    "bbox": [float(rng.uniform(0, 1900)), float(rng.uniform(0, 800)), 0.45 * h, h],
                    "score": round(float(rng.random() * 0.6), 3),
                }
            )
        if i % 10 == 0:
            regions.append({"image_id": i, "bbox": [0.0, 0.0, 300.0, 400.0]})
    truth = {
        "images": images,
        "annotations": annotations,
        "categories": [{"id": 1, "name": "pedestrian"}],
        "dont_care": regions,
    }
    return truth, results


def oracle_scene(truth, results):
    by_image = {im["id"]: ([], []) for im in truth["images"]}
    for a in truth["annotations"]:
        by_image[a["image_id"]][0].append((*a["bbox"], a["visibility"], 0))
    for r in truth["dont_care"]:
        by_image[r["image_id"]][0].append((*r["bbox"], None, 1))
    for d in results:
        by_image[d["image_id"]][1].append((*d["bbox"], d["score"]))
    return [by_image[im["id"]] for im in truth["images"]]


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--images", type=int, default=2000)
    parser.add_argument("--boxes", type=int, default=8)
    parser.add_argument("--detections", type=int, default=40)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    sys.path.insert(0, str(ROOT))
    from evaluation.engine import evaluate_setups, load_predictions, load_truth
    from tests.engine import pedestrian_oracle

    truth_dict, results = street(
        np.random.default_rng(args.seed), args.images, args.boxes, args.detections
    )
    with tempfile.TemporaryDirectory() as work:
        gt, dt = pathlib.Path(work, "gt.json"), pathlib.Path(work, "dt.json")
        gt.write_text(json.dumps(truth_dict))
        dt.write_text(json.dumps(results))
        truth = load_truth(gt)
        predictions = load_predictions(dt, truth)
    scene = oracle_scene(truth_dict, results)
    references = {
        "miss-rate": pedestrian_oracle.toolbox,
        "miss-rate-cityscale": pedestrian_oracle.cityscale,
        "miss-rate-caltech": lambda s, setup: pedestrian_oracle.toolbox(s, setup, caltech=True),
    }
    print(
        f"{args.images} images, {len(truth_dict['annotations'])} boxes, {len(results)} detections"
    )
    print(f"{'preset':<22}{'engine s':>10}{'reference s':>13}{'ratio':>8}  reasonable MR  agree")
    for name, reference in references.items():
        start = time.process_time()
        ours = evaluate_setups(truth, predictions, name)
        engine_s = time.process_time() - start
        start = time.process_time()
        theirs = {setup: reference(scene, setup)[0] for setup in SETUPS}
        reference_s = time.process_time() - start
        agree = all(
            (theirs[s] is None and ours["levels"][s]["miss_rate"] is None)
            or abs(ours["levels"][s]["miss_rate"] - theirs[s])
            <= 1e-12 * max(abs(theirs[s]), 1e-300)
            for s in SETUPS
        )
        print(
            f"{name:<22}{engine_s:>10.2f}{reference_s:>13.2f}{reference_s / engine_s:>7.1f}x"
            f"  {ours['headline']:.6f}      {'yes' if agree else 'NO'}"
        )


if __name__ == "__main__":
    main()
