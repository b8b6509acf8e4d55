"""A seeded, camera-like benchmark at scale, written as COCO-style JSON (invented data).

Vectorised so that 5,000 images and 500,000 detections take seconds to make.
"""

import json
import shutil

import numpy as np


def generate(
    seed=7,
    *,
    n_images=5000,
    n_classes=80,
    boxes_per_image=7.2,
    detections=500_000,
    width=1280,
    height=720,
):
    rng = np.random.default_rng(seed)
    n_boxes = int(rng.poisson(boxes_per_image, n_images).sum())
    box_image = np.sort(rng.integers(0, n_images, n_boxes))
    # Class frequencies fall off like a long-tailed road scene.
    popularity = 1.0 / np.arange(1, n_classes + 1) ** 0.8
    box_class = rng.choice(n_classes, n_boxes, p=popularity / popularity.sum())
    w = np.exp(rng.uniform(np.log(8), np.log(width / 3), n_boxes))
    h = np.exp(rng.uniform(np.log(8), np.log(height / 3), n_boxes))
    x = rng.uniform(0, width - w)
    y = rng.uniform(0, height - h)
    crowd = rng.random(n_boxes) < 0.01

    # Detections: jittered copies of the truth (hits and duplicates), then false alarms.
    n_near = int(detections * 0.45)
    src = rng.integers(0, n_boxes, n_near)
    jitter = rng.choice([0.03, 0.08, 0.2], n_near)
    dw = w[src] * np.exp(rng.normal(0, jitter))
    dh = h[src] * np.exp(rng.normal(0, jitter))
    dx = x[src] + rng.normal(0, jitter * w[src])
    dy = y[src] + rng.normal(0, jitter * h[src])
    dclass = np.where(rng.random(n_near) < 0.05, rng.integers(0, n_classes, n_near), box_class[src])
    dimage = box_image[src]
    n_far = detections - n_near
    fw = np.exp(rng.uniform(np.log(8), np.log(width / 3), n_far))
    fh = np.exp(rng.uniform(np.log(8), np.log(height / 3), n_far))
    fx = rng.uniform(0, width - fw)
    fy = rng.uniform(0, height - fh)
    det = {
        "image": np.r_[dimage, rng.integers(0, n_images, n_far)],
        "class": np.r_[dclass, rng.choice(n_classes, n_far, p=popularity / popularity.sum())],
        "x": np.r_[dx, fx],
        "y": np.r_[dy, fy],
        "w": np.r_[dw, fw],
        "h": np.r_[dh, fh],
    }
    det["x"] = np.clip(det["x"], 0, width - 2)
    det["y"] = np.clip(det["y"], 0, height - 2)
    det["w"] = np.clip(det["w"], 1, width - det["x"])
    det["h"] = np.clip(det["h"], 1, height - det["y"])
    near_score = rng.beta(5, 2, n_near)
    far_score = rng.beta(1.2, 5, n_far)
    det["score"] = np.round(np.r_[near_score, far_score], 3)  # rounded: many ties
    order = rng.permutation(detections)
    det = {k: v[order] for k, v in det.items()}

    image_ids = np.arange(1, n_images + 1)
    truth = {
        "images": [{"id": int(i), "width": width, "height": height} for i in image_ids],
        "annotations": [
            {
                "id": int(i + 1),
                "image_id": int(box_image[i] + 1),
                "category_id": int(box_class[i] + 1),
                "bbox": [
                    round(float(x[i]), 2),
                    round(float(y[i]), 2),
                    round(float(w[i]), 2),
                    round(float(h[i]), 2),
                ],
                "area": round(float(w[i] * h[i]), 2),
                "iscrowd": int(crowd[i]),
            }
            for i in range(n_boxes)
        ],
        "categories": [{"id": k + 1, "name": f"class_{k + 1:02d}"} for k in range(n_classes)],
    }
    predictions = [
        {
            "image_id": int(det["image"][i] + 1),
            "category_id": int(det["class"][i] + 1),
            "bbox": [
                round(float(det["x"][i]), 2),
                round(float(det["y"][i]), 2),
                round(float(det["w"][i]), 2),
                round(float(det["h"][i]), 2),
            ],
            "score": float(det["score"][i]),
        }
        for i in range(detections)
    ]
    return truth, predictions


def write(directory, **kwargs):
    truth, predictions = generate(**kwargs)
    gt_path, dt_path = directory / "truth.json", directory / "predictions.json"
    gt_path.write_text(json.dumps(truth))
    dt_path.write_text(json.dumps(predictions))
    return gt_path, dt_path


def size_arguments(parser, *, images, detections, classes=None, seed=None):
    """The size options of a benchmark on this split, with that benchmark's defaults:
    ``--images``, ``--detections``, and ``--classes`` and ``--seed`` where given."""
    parser.add_argument("--images", type=int, default=images)
    parser.add_argument("--detections", type=int, default=detections)
    if classes is not None:
        parser.add_argument("--classes", type=int, default=classes)
    if seed is not None:
        parser.add_argument("--seed", type=int, default=seed)


def write_fresh(directory, args, **frame):
    """``write`` at the size ``args`` asks (``size_arguments``), into ``directory``
    (made if missing) with its engine cache cleared, so every run starts cold."""
    directory.mkdir(parents=True, exist_ok=True)
    shutil.rmtree(directory / "cache", ignore_errors=True)
    return write(
        directory,
        seed=args.seed,
        n_images=args.images,
        detections=args.detections,
        n_classes=args.classes,
        **frame,
    )
