"""The invented demo scenario: the Larkspur Mobility Lab's shuttles in Kestrel Bay.

Everything is generated from seeds: splits that look like camera benchmarks (1280x720
or 1920x1080 frames, a few to a few dozen boxes each) and the predictions of each
model version, whose quality improves with noise over about three months. Version 1.5
of the forward camera detector really loses pedestrians at night; version 1.3 has a
small drop that is noise.
"""

import datetime
import zlib

import numpy as np

CLASSES = [
    "car",
    "van",
    "bus",
    "pedestrian",
    "cyclist",
    "scooter_rider",
    "traffic_light",
    "traffic_sign",
]
# Relative frequency and typical height (px at 720p) of each class in the harbour town.
FREQUENCY = np.array([0.30, 0.08, 0.04, 0.22, 0.08, 0.04, 0.12, 0.12])
HEIGHT = np.array([90, 110, 180, 120, 110, 115, 40, 45])
ASPECT = np.array([1.6, 1.3, 1.4, 0.4, 0.6, 0.5, 0.45, 1.0])  # width / height

SPLITS = [
    # name, revision, seed, images, frame, night share, extra tags
    ("bay-day", 1, 11, 220, (1280, 720), 0.0, ("harbour",)),
    ("bay-night", 1, 12, 180, (1280, 720), 1.0, ("harbour",)),
    ("ring-road", 1, 14, 160, (1920, 1080), 0.3, ("ring-road",)),
]
RELABELLED = ("bay-night", 2, 13)  # rev 2: the same frames, missed pedestrians added

FORWARD_VERSIONS = ["0.9", "1.0", "1.1", "1.2", "1.3", "1.4", "1.5", "1.6"]
KERBSIDE_VERSIONS = ["0.9", "1.0", "1.1", "1.2", "1.3"]


def split_truth(name, revision, seed, n_images, frame, night_share, extra_tags):
    """A COCO-style ground-truth dict with image tags (day / night / rain / ...)."""
    rng = np.random.default_rng(seed)
    width, height = frame
    scale = height / 720
    images, annotations = [], []
    for i in range(n_images):
        night = rng.random() < night_share
        tags = ["night" if night else "day", *extra_tags]
        if rng.random() < 0.2:
            tags.append("rain")
        image_id = i + 1
        images.append(
            {
                "id": image_id,
                "width": width,
                "height": height,
                "file_name": f"{name}/{image_id:05d}.jpg",
                "tags": tags,
            }
        )
        for _ in range(int(rng.integers(3, 25))):
            k = int(rng.choice(len(CLASSES), p=FREQUENCY / FREQUENCY.sum()))
            h = float(np.clip(HEIGHT[k] * scale * np.exp(rng.normal(0, 0.6)), 12, height * 0.8))
            w = float(np.clip(h * ASPECT[k] * np.exp(rng.normal(0, 0.15)), 6, width * 0.8))
            x = float(rng.uniform(0, width - w))
            y = float(rng.uniform(height * 0.15, height - h)) if h < height * 0.85 else 0.0
            annotations.append(
                {
                    "id": len(annotations) + 1,
                    "image_id": image_id,
                    "category_id": k + 1,
                    "bbox": [round(x, 1), round(y, 1), round(w, 1), round(h, 1)],
                    "area": round(w * h, 1),
                    "iscrowd": 0,
                }
            )
    return {
        "info": {"description": f"Kestrel Bay {name} rev {revision} (invented)"},
        "images": images,
        "annotations": annotations,
        "categories": [{"id": k + 1, "name": c} for k, c in enumerate(CLASSES)],
    }


def relabelled(truth, seed):
    """Revision 2 of a split: the same frames, with pedestrians the first pass missed."""
    rng = np.random.default_rng(seed)
    out = {**truth, "annotations": [dict(a) for a in truth["annotations"]]}
    pedestrian = CLASSES.index("pedestrian") + 1
    for image in truth["images"]:
        if rng.random() < 0.35:
            h = float(rng.uniform(60, 160))
            w = h * 0.4
            x = float(rng.uniform(0, image["width"] - w))
            y = float(rng.uniform(image["height"] * 0.3, image["height"] - h))
            out["annotations"].append(
                {
                    "id": len(out["annotations"]) + 1,
                    "image_id": image["id"],
                    "category_id": pedestrian,
                    "bbox": [round(x, 1), round(y, 1), round(w, 1), round(h, 1)],
                    "area": round(w * h, 1),
                    "iscrowd": 0,
                }
            )
    out["info"] = {"description": truth["info"]["description"].replace("rev 1", "rev 2")}
    return out


def version_quality(detector, index, label):
    """Recall of each class (day, night) for one version: rising, with noise."""
    rng = np.random.default_rng(zlib.crc32(f"{detector}-{label}".encode()))
    base = 0.62 + 0.035 * index + rng.normal(0, 0.008)
    if detector == "forward" and label == "1.3":
        base = 0.62 + 0.035 * (index - 1) - 0.006  # a small drop from 1.2: noise
    day = np.clip(base + np.array([0.12, 0.05, 0.08, 0.0, -0.04, -0.08, 0.02, 0.04]), 0.05, 0.97)
    night = np.clip(day - 0.12, 0.05, 0.95)
    if detector == "forward" and label == "1.5":
        night[CLASSES.index("pedestrian")] -= 0.30  # the real regression
    step = index - 1 if (detector, label) == ("forward", "1.3") else index
    return day, night, max(0.03, 0.09 - 0.007 * step)


def predictions(truth, day_recall, night_recall, jitter, seed):
    """COCO-style detections: jittered hits, duplicates and false alarms."""
    rng = np.random.default_rng(seed)
    night_images = {im["id"] for im in truth["images"] if "night" in im["tags"]}
    frames = {im["id"]: (im["width"], im["height"]) for im in truth["images"]}
    out = []

    def add(image_id, k, box, score):
        width, height = frames[image_id]
        x, y, w, h = box
        x, y = min(max(x, 0.0), width - 2), min(max(y, 0.0), height - 2)
        w, h = max(2.0, min(w, width - x)), max(2.0, min(h, height - y))
        out.append(
            {
                "image_id": image_id,
                "category_id": k + 1,
                "bbox": [round(x, 2), round(y, 2), round(w, 2), round(h, 2)],
                "score": round(float(score), 4),
            }
        )

    for ann in truth["annotations"]:
        k = ann["category_id"] - 1
        recall = night_recall[k] if ann["image_id"] in night_images else day_recall[k]
        if rng.random() >= recall:
            continue
        x, y, w, h = ann["bbox"]
        box = (
            x + rng.normal(0, jitter * w),
            y + rng.normal(0, jitter * h),
            w * np.exp(rng.normal(0, jitter)),
            h * np.exp(rng.normal(0, jitter)),
        )
        add(ann["image_id"], k, box, rng.beta(6, 2))
        if rng.random() < 0.08:
            add(ann["image_id"], k, (box[0] + 3, box[1] + 2, box[2], box[3]), rng.beta(2, 4))
    for image in truth["images"]:
        width, height = image["width"], image["height"]
        for _ in range(int(rng.poisson(2))):
            k = int(rng.choice(len(CLASSES), p=FREQUENCY / FREQUENCY.sum()))
            h = float(rng.uniform(20, height / 4))
            add(
                image["id"],
                k,
                (rng.uniform(0, width - h), rng.uniform(0, height - h), h * ASPECT[k], h),
                rng.beta(1.5, 5),
            )
    return out


def release_dates(count, today=None):
    """Evenly spread over the last ~90 days, with a little jitter."""
    today = today or datetime.datetime.now(datetime.UTC)
    step = 90 / max(count - 1, 1)
    return [
        today - datetime.timedelta(days=90 - i * step, hours=(i * 7) % 11) for i in range(count)
    ]
