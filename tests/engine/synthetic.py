"""Seeded synthetic splits and detections for tests and benchmarks (invented data)."""

import json

import numpy as np


def make_split(
    rng,
    *,
    n_images=20,
    n_classes=3,
    boxes_per_image=5,
    crowd_rate=0.05,
    width=640,
    height=480,
    tags=("night", "rain"),
    area_noise=0.0,
    integer_coords=False,
):
    """A COCO-style ground-truth dict with ids >= 1 (the reference mis-reads id 0)."""
    images, annotations = [], []
    ann_id = 1
    image_ids = rng.choice(np.arange(1, 10 * n_images + 1), n_images, replace=False)
    for image_id in image_ids.tolist():
        image_tags = [t for t in tags if rng.random() < 0.4]
        images.append({"id": image_id, "width": width, "height": height, "tags": image_tags})
        for _ in range(int(rng.poisson(boxes_per_image))):
            w = float(np.exp(rng.uniform(np.log(4), np.log(width / 2))))
            h = float(np.exp(rng.uniform(np.log(4), np.log(height / 2))))
            x = float(rng.uniform(0, width - w))
            y = float(rng.uniform(0, height - h))
            if integer_coords:
                x, y, w, h = (
                    float(int(x)),
                    float(int(y)),
                    float(max(1, int(w))),
                    float(max(1, int(h))),
                )
            area = w * h * (1 + area_noise * rng.uniform(-1, 1))
            annotations.append(
                {
                    "id": ann_id,
                    "image_id": image_id,
                    "category_id": int(rng.integers(1, n_classes + 1)),
                    "bbox": [x, y, w, h],
                    "area": area,
                    "iscrowd": int(rng.random() < crowd_rate),
                }
            )
            ann_id += 1
    categories = [{"id": k, "name": f"class{k}"} for k in range(1, n_classes + 1)]
    return {"images": images, "annotations": annotations, "categories": categories}


def make_detections(
    rng,
    split,
    *,
    hit_rate=0.7,
    jitter=0.15,
    false_per_image=3,
    duplicate_rate=0.2,
    score_levels=None,
    extra_class_rate=0.0,
):
    """Detections near the ground truth (jittered), duplicates and false alarms.

    ``score_levels``: quantise scores to this many values to force ties.
    """
    dets = []
    by_image = {im["id"]: im for im in split["images"]}
    n_classes = len(split["categories"])

    def score():
        s = float(rng.uniform(0.01, 1.0))
        return float(np.round(s * score_levels) / score_levels) if score_levels else s

    def clip(x, y, w, h, im):
        x = min(max(x, 0.0), im["width"] - 1)
        y = min(max(y, 0.0), im["height"] - 1)
        w = max(1.0, min(w, im["width"] - x))
        h = max(1.0, min(h, im["height"] - y))
        return [x, y, w, h]

    for ann in split["annotations"]:
        im = by_image[ann["image_id"]]
        copies = int(rng.random() < hit_rate) + int(rng.random() < duplicate_rate)
        for _ in range(copies):
            x, y, w, h = ann["bbox"]
            x += rng.normal(0, jitter * w)
            y += rng.normal(0, jitter * h)
            w *= float(np.exp(rng.normal(0, jitter)))
            h *= float(np.exp(rng.normal(0, jitter)))
            cat = ann["category_id"]
            if rng.random() < 0.05:
                cat = int(rng.integers(1, n_classes + 1))
            dets.append(
                {
                    "image_id": ann["image_id"],
                    "category_id": cat,
                    "bbox": clip(x, y, w, h, im),
                    "score": score(),
                }
            )
    for im in split["images"]:
        for _ in range(int(rng.poisson(false_per_image))):
            w = float(rng.uniform(4, im["width"] / 3))
            h = float(rng.uniform(4, im["height"] / 3))
            dets.append(
                {
                    "image_id": im["id"],
                    "category_id": int(rng.integers(1, n_classes + 1)),
                    "bbox": clip(
                        float(rng.uniform(0, im["width"] - w)),
                        float(rng.uniform(0, im["height"] - h)),
                        w,
                        h,
                        im,
                    ),
                    "score": score(),
                }
            )
    if extra_class_rate:
        for d in dets:
            if rng.random() < extra_class_rate:
                d["category_id"] = n_classes + 1 + int(rng.integers(0, 2))
    order = rng.permutation(len(dets))
    return [dets[i] for i in order]


def write_json(path, obj):
    with open(path, "w") as f:
        json.dump(obj, f)
    return path
