"""The invented demo scenario: the Larkspur Mobility Lab's shuttles in Kestrel Bay.

Everything is generated from seeds: splits that look like camera benchmarks (1280x720
or 1920x1080 frames, a few to a few dozen boxes each) and the predictions of each
model version, whose quality improves with noise over about three months. Version 1.5
of the forward camera detector really loses pedestrians at night; version 1.3 has a
small drop that is noise; 1.6 is genuinely better than the 1.4 baseline; 1.7 was
uploaded on one split only; kerbside 1.3's first night upload was broken and replaced.
``story`` orders the events; ``seed_demo`` replays them at their dates.
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

FORWARD_VERSIONS = ["0.9", "1.0", "1.1", "1.2", "1.3", "1.4", "1.5", "1.6", "1.7"]
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
        "annotations": with_road_attributes(annotations, images, seed),
        "dont_care": dont_care_regions(images, seed),
        "categories": [{"id": k + 1, "name": c} for k, c in enumerate(CLASSES)],
    }


def with_road_attributes(annotations, images, seed):
    """Occlusion level (0 fully visible, 1 partly, 2 largely occluded), truncation (the
    share of the object outside the frame: boxes touching an edge) and the visible
    fraction of every box, from their own generator (the boxes stay as they were)."""
    rng = np.random.default_rng(seed + 7000)
    frames = {im["id"]: (im["width"], im["height"]) for im in images}
    visible = {0: (0.85, 1.0), 1: (0.45, 0.85), 2: (0.15, 0.45)}
    for ann in annotations:
        width, height = frames[ann["image_id"]]
        x, y, w, h = ann["bbox"]
        occlusion = int(rng.choice(3, p=[0.6, 0.28, 0.12]))
        at_edge = x < 2 or y < 2 or x + w > width - 2 or y + h > height - 2
        truncation = float(rng.uniform(0.05, 0.6)) if at_edge or rng.random() < 0.06 else 0.0
        ann["occlusion"] = occlusion
        ann["truncation"] = round(truncation, 2)
        ann["visibility"] = round(float(rng.uniform(*visible[occlusion])), 2)
    return annotations


def dont_care_regions(images, seed):
    """A few don't-care regions (a crowd behind a fence, a reflection in a shop window):
    one on about one image in twenty."""
    rng = np.random.default_rng(seed + 8000)
    regions = []
    for image in images:
        if rng.random() < 0.05:
            width, height = image["width"], image["height"]
            w, h = float(rng.uniform(0.1, 0.25) * width), float(rng.uniform(0.08, 0.2) * height)
            x, y = float(rng.uniform(0, width - w)), float(rng.uniform(0.3 * height, height - h))
            regions.append({"image_id": image["id"], "bbox": [round(v, 1) for v in (x, y, w, h)]})
    return regions


def relabelled(truth, seed):
    """Revision 2 of a split: the same frames, with pedestrians the first pass missed."""
    rng = np.random.default_rng(seed)
    attributes = np.random.default_rng(seed + 7000)  # its own draws: the boxes stay as they were
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
                    "occlusion": int(attributes.random() < 0.3),  # missed: often partly hidden
                    "truncation": 0.0,
                    "visibility": round(float(attributes.uniform(0.5, 1.0)), 2),
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


# The class a detector mistakes each class for most often.
CONFUSABLE = {
    "car": "van",
    "van": "car",
    "bus": "van",
    "pedestrian": "cyclist",
    "cyclist": "scooter_rider",
    "scooter_rider": "cyclist",
    "traffic_light": "traffic_sign",
    "traffic_sign": "traffic_light",
}


def predictions(truth, day_recall, night_recall, jitter, seed, *, false_alarms=6.0):
    """COCO-style detections that behave like a real detector's.

    Each ground-truth box is found with a probability that falls with its size and at
    night (the class's recall is the average); a found box is scored by how visible it
    is, with noise, so hits and misses of the score ranking overlap. Among found boxes
    some are badly localised (IoU well under 0.5: a false positive and a miss at once),
    some get a confusable class (a van called a car), some are duplicated with a lower
    score. False alarms on the background are mostly weak, a tenth of them confident.
    """
    rng = np.random.default_rng(seed)
    night_images = {im["id"] for im in truth["images"] if "night" in im["tags"]}
    frames = {im["id"]: (im["width"], im["height"]) for im in truth["images"]}
    index = {name: k for k, name in enumerate(CLASSES)}
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
                "score": round(float(np.clip(score, 0.001, 0.999)), 4),
            }
        )

    def scored(mean, concentration=7.0):
        mean = float(np.clip(mean, 0.05, 0.95))
        return rng.beta(mean * concentration, (1 - mean) * concentration)

    for ann in truth["annotations"]:
        k = ann["category_id"] - 1
        x, y, w, h = ann["bbox"]
        frame_height = frames[ann["image_id"]][1]
        night = ann["image_id"] in night_images
        # 0 for a box 3 % of the frame high, 1 for 25 % and more.
        visibility = float(np.clip(np.log(h / (0.03 * frame_height)) / np.log(25 / 3), 0, 1))
        recall = (night_recall if night else day_recall)[k]
        if rng.random() >= np.clip(recall + 0.3 * (visibility - 0.5), 0.01, 0.995):
            if rng.random() < 0.4:  # barely seen: a weak, loose box
                loose = 2.5 * jitter
                add(
                    ann["image_id"],
                    k,
                    (x + rng.normal(0, loose * w), y + rng.normal(0, loose * h), w, h),
                    scored(0.12, 5.0),
                )
            continue  # otherwise missed
        score = scored(0.42 + 0.4 * visibility - (0.1 if night else 0.0))
        kind = rng.random()
        if kind < 0.10:  # badly localised: shifted by half its size or more
            dx, dy = rng.uniform(0.45, 0.8) * w * rng.choice([-1, 1]), rng.normal(0, 0.2) * h
            add(ann["image_id"], k, (x + dx, y + dy, w, h), score * 0.9)
            continue
        if kind < 0.15:  # the right place, a confusable class
            k = index[CONFUSABLE[CLASSES[k]]]
            score *= 0.8
        box = (
            x + rng.normal(0, jitter * w),
            y + rng.normal(0, jitter * h),
            w * np.exp(rng.normal(0, jitter)),
            h * np.exp(rng.normal(0, jitter)),
        )
        add(ann["image_id"], k, box, score)
        if rng.random() < 0.08:  # a duplicate, slightly offset, weaker
            add(
                ann["image_id"],
                k,
                (box[0] + 0.1 * w, box[1] + 0.05 * h, box[2], box[3]),
                score * 0.6,
            )
    for image in truth["images"]:
        width, height = image["width"], image["height"]
        for _ in range(int(rng.poisson(false_alarms))):
            k = int(rng.choice(len(CLASSES), p=FREQUENCY / FREQUENCY.sum()))
            h = float(rng.uniform(20, height / 4))
            confident = rng.random() < 0.08
            add(
                image["id"],
                k,
                (rng.uniform(0, width - h), rng.uniform(0, height - h), h * ASPECT[k], h),
                scored(0.7 if confident else 0.15, 6.0),
            )
    return out


def spoiled(detections):
    """The same detections with one box cut short to three numbers, as a broken export
    writes it."""
    out = [dict(d) for d in detections]
    at = len(out) // 2
    out[at]["bbox"] = list(out[at]["bbox"][:3])
    return out


def release_dates(count, today=None):
    """Evenly spread over the last ~90 days, with a little jitter."""
    today = today or datetime.datetime.now(datetime.UTC)
    step = 90 / max(count - 1, 1)
    return [
        today - datetime.timedelta(days=90 - i * step, hours=(i * 7) % 11) for i in range(count)
    ]


DETECTORS = [
    ("forward", "Forward camera", "Front-facing 1280x720 camera of the harbour shuttles."),
    ("kerbside", "Kerbside camera", "Side camera watching the kerb at stops."),
]
VERSIONS = {"forward": FORWARD_VERSIONS, "kerbside": KERBSIDE_VERSIONS}

# The example release criteria, introduced once forward 1.2 was approved. Thresholds
# sit below what the baselines reach, so a genuinely better candidate passes.
RULES = [
    {"kind": "min_value", "metric": "AP50", "class": "pedestrian", "split": "*", "threshold": 0.5},
    {"kind": "max_drop", "metric": "AP", "class": "mean", "split": "*", "tolerance": 1.0},
    {
        "kind": "no_significant_drop",
        "metric": "AP",
        "class": "*",
        "split": "*",
        "confidence": 0.95,
        "tolerance": 1.0,
    },
]
# The forward camera is also judged on KITTI-style moderate difficulty (its suite names
# kitti2d after the primary protocol: mean AP over 40 recall positions at moderate) and
# on the reasonable pedestrian setup (miss-rate: log-average miss rate, lower is better;
# 1.5's night pedestrians miss it, 1.3-1.7 otherwise stay under 0.67), and a rise of that
# miss rate over the baseline's must not be significant (1.5's night rise is).
LEVEL_PROTOCOLS = {"forward": ("kitti2d", "miss-rate")}
LEVEL_RULES = {
    "forward": [
        {
            "kind": "min_value",
            "metric": "AP",
            "level": "moderate",
            "class": "mean",
            "split": "*",
            "threshold": 0.4,
        },
        {
            "kind": "min_value",
            "metric": "miss_rate",
            "level": "reasonable",
            "class": "pedestrian",
            "split": "*",
            "threshold": 0.7,
        },
        {  # a rise of the reasonable miss rate beyond noise (paired image bootstrap)
            "kind": "no_significant_drop",
            "metric": "miss_rate",
            "level": "reasonable",
            "class": "pedestrian",
            "split": "*",
            "confidence": 0.95,
            "tolerance": 1.0,
        },
    ]
}
CRITERIA_AFTER = ("forward", "1.2")

DECISIONS = {  # the lead's decisions, two days after each version's upload
    ("forward", "0.9"): ("rejected", "Trial run on the new labels; not for the fleet."),
    ("forward", "1.0"): ("approved", "First release for the harbour loop."),
    ("forward", "1.1"): ("rejected", "Superseded by 1.2 before the fleet update."),
    ("forward", "1.2"): ("approved", "Better on every split."),
    ("forward", "1.3"): (
        "rejected",
        "No gain over 1.2; its small drops are noise, not worth an update.",
    ),
    ("forward", "1.4"): ("approved", "Clear gain, night included."),
    ("kerbside", "0.9"): ("rejected", "Trial run."),
    ("kerbside", "1.0"): ("approved", "Kerbside stops covered."),
    ("kerbside", "1.1"): ("approved", "Fewer misses at the ferry terminal stop."),
    ("kerbside", "1.2"): ("approved", "Better at dusk and in rain."),
}
UPLOADS = {  # versions not uploaded on every split as usual
    ("forward", "1.7"): {"only": "bay-day:1"},  # incomplete: the other splits never came
    ("kerbside", "1.3"): {"broken": "bay-night:2"},  # a broken export, replaced a day later
}


def index_of(key, label):
    return VERSIONS[key].index(label)


def story(now):
    """The scenario's events in time order: ``(moment, action, detector key, version
    label, detail)`` with action register, decide, replace or criteria."""
    day = datetime.timedelta(days=1)
    events = []
    for key, labels in VERSIONS.items():
        for label, when in zip(labels, release_dates(len(labels), today=now - 3 * day)):
            upload = UPLOADS.get((key, label), {})
            events.append((when, "register", key, label, upload))
            if "broken" in upload:
                events.append((when + day, "replace", key, label, upload["broken"]))
            if (key, label) in DECISIONS:
                events.append((when + 2 * day, "decide", key, label, DECISIONS[(key, label)]))
    criteria_at = next(e[0] for e in events if e[1] == "decide" and e[2:4] == CRITERIA_AFTER)
    events.append((criteria_at + day / 4, "criteria", None, None, None))
    return {"start": now - 95 * day, "events": sorted(events, key=lambda e: e[0])}
