"""The protocol record of a level result (KITTI difficulty levels, pedestrian setups).

``annotate_levels`` finishes a level protocol's output as ``provenance.annotate``
finishes a ``coco``-style result: ``counts``, ``protocol_record`` (the same keys as
``provenance.protocol_record``, so ``explain`` and the compare page read both, plus the
level definition: ``kind``, ``levels``, ``headline_level``, ``neighbours``, ...),
``engine_version`` and ``truth_fingerprint``. The CLI (``score --protocol kitti2d``,
``miss-rate*``) and the platform (``evaluation.levels.score``) both call it.
"""

from dataclasses import asdict

import numpy as np

from .data import name_key
from .difficulty import DIFFICULTY_PRESETS, N_SAMPLE_POINTS, get_difficulty_protocol
from .pedestrian_setups import (
    MIN_OVERLAP,
    MISS_RATE_PRESETS,
    category_one,
    get_miss_rate_protocol,
)
from .provenance import counts as result_counts
from .provenance import left_out_counts, repeated_id_counts
from .version import ENGINE_VERSION

_NOT_READ = "not computed by this protocol"
#: How ``absent_classes`` starts for a category evaluated within another of its name.
MERGED = "evaluated with"


def _kitti_record(name, truth):
    p = get_difficulty_protocol(name)
    record = asdict(p)
    record["kind"] = "levels"
    record["metric"] = "AP"
    record["levels"] = [asdict(level) for level in p.levels]
    record["neighbours"] = {k: list(v) for k, v in p.neighbours.items()}
    # keyed by the shown names: categories sharing a name stay apart in the record
    per_class = {
        truth.classes[k]: float(t)
        for c, t in p.class_overlap.items()
        for k in truth.classes_named(c)
    }
    return {
        **record,
        "value": "AP_R40",
        "matching": "per ground-truth box, overlap strictly above the class's threshold "
        "(the devkit's per-box overlap > threshold); don't-care regions by intersection "
        "over the detection's area (KITTI devkit computeStatistics)",
        "iou_thresholds": sorted(set(p.class_overlap.values())),
        "class_iou_thresholds": per_class,
        "recall_sampling": {
            "kind": f"{N_SAMPLE_POINTS} score thresholds",
            "count": N_SAMPLE_POINTS,
            "points": None,
            "rule": "thresholds from the true positives' scores at recall steps of 1/40 "
            "(devkit getThresholds)",
        },
        "interpolation": "precision at each threshold replaced by the maximum to its "
        "right; AP_R40 = mean of slots 1-40, AP_R11 = mean of slots 0, 4, ..., 40 "
        "(devkit eval_class)",
        "precision_epsilon": 0.0,
        "detection_cap": {"max_detections": None, "kind": "none"},
        "tie_order": "per image, ground truth in file order takes the highest-scored "
        "untaken detection, the first in file order on ties (devkit computeStatistics)",
        "zero_id": "annotation ids are not read",
        "difficult": "the difficult flag is not read (the KITTI devkit has none)",
        "pixel_offset": 0,
        "area_source": {
            "truth": "not read: levels by box height y2 - y1, occlusion, truncation",
            "predictions": "not read: detection height truncated to an integer",
        },
        "size_ranges": [],
        "miss_rate": _NOT_READ,
        "operating_point": _NOT_READ,
    }


def _visibility_source(truth, city):
    """Which annotation key the setups' visibility came from, by the split's reading
    (``load_truth(vis_ratio=)``): ``as-given`` gives ``truth.vis_ratio``, ``read`` the
    counts alone, ``unread`` neither."""
    if "visibility_from_vis_ratio" not in truth.box_counts:
        return "an annotation's visibility key; a vis_ratio key is not read"
    if city and truth.vis_ratio is not None:
        return (
            "an annotation's vis_ratio key as given (any number or boolean, out of 0-1 "
            "too), also beside a visibility key, else its visibility key"
        )
    return "an annotation's visibility key, else its vis_ratio key within 0-1"


def _height_source(truth, city):
    """Which height the setups compare, said only where it is not the box's h: under
    ``miss-rate-cityscale`` an annotation's ``height`` key where the split gives one
    (``GroundTruth.height_key``); elsewhere nothing (the record stays as before)."""
    if city and truth.height_key is not None:
        return " (an annotation's height key as given, any number or boolean, else bbox[3])"
    return ""


def _miss_rate_record(name, truth):
    p = get_miss_rate_protocol(name)
    cap = p.max_detections
    toolbox = p.variant == "toolbox"
    city = p.variant == "cityscale"
    return {
        **p.record(),
        "matching": "per image, detections by score (stable) take the unmatched regular "
        f"box of greatest IoU >= {MIN_OVERLAP}, else the first ignore box whose "
        "intersection over the detection's area is >= 0.5 "
        + ("(city-scale evaluateImg)" if city else "(toolbox bbGt evalRes)"),
        "iou_thresholds": [MIN_OVERLAP],
        "class_iou_thresholds": {c: MIN_OVERLAP for c in truth.classes},
        "recall_sampling": {
            "kind": f"{len(p.fppi_points)} FPPI points",
            "count": len(p.fppi_points),
            "points": list(p.fppi_points),
            "rule": "a curve point after every detection; at each FPPI point the last "
            "point at or below it"
            + (", miss rate 1 if none" if toolbox else ", the last recall if none"),
        },
        "interpolation": "log-average miss rate: exp(mean ln(max(miss rate, clamp))) over "
        "the FPPI points" + ("" if toolbox else ", no clamp"),
        "precision_epsilon": 0.0,
        "detection_cap": {
            "max_detections": None if cap is None else [cap],
            "kind": "none" if cap is None else "per image and class, highest scores first",
        },
        "tie_order": "ties in score keep accumulation order: images by ascending id "
        + (
            "(the toolbox takes its images in its annotation files' name order: a split "
            "whose ids ascend as those names do gives its order)"
            if not city
            else "(the script's np.unique of the image ids)"
        )
        + ", then score order within the image (stable sort, toolbox compRoc); NaN scores "
        + ("first, as MATLAB's descending sort" if toolbox else "last, as numpy's argsort"),
        "zero_id": (
            "a match with the box of annotation id 0 is no true positive and the box stays "
            "taken (evaluateImg stores the box's id in dtMatches)"
            if city
            else "annotation ids are not read"
        ),
        "difficult": (
            "the difficult flag is not read (the city-scale code has none)"
            if city
            else "a box flagged difficult is an ignore box (as crowd and ignore flags)"
        ),
        "pixel_offset": 0,
        "area_source": {
            "truth": "not read: setups by box height"
            + _height_source(truth, city)
            + " and visibility ("
            + _visibility_source(truth, city)
            + "; how many from vis_ratio: counts.boxes.truth)",
            "predictions": "not read: detections by height (expanded range)",
        },
        "size_ranges": [],
        "miss_rate": "every detection in accumulation order, last point at or below each "
        "FPPI point"
        + (", miss rate 1 if none, clamp 1e-10" if toolbox else "")
        + f" ({p.variant})",
        "operating_point": _NOT_READ,
    }


def level_record(name, truth, predictions, output):
    """The full protocol record of a level output (``difficulty.evaluate_levels`` or
    ``pedestrian.evaluate_setups``): ``provenance.protocol_record``'s keys and the level
    definition. Averaged classes: those with a value at the headline level; absent:
    every other class of the split, and why."""
    own = [name_key(n) for n in truth.category_names]  # rules name classes by these
    merged = {}  # a category evaluated with the first of its name: that one's index
    if name in DIFFICULTY_PRESETS:
        record = _kitti_record(name, truth)
        value_key = "AP_R40"
        evaluated = {name_key(c) for c in record["class_overlap"]}
        for c in record["class_overlap"]:
            first, *rest = truth.classes_named(c) or [None]
            merged.update(dict.fromkeys(rest, first))
    else:
        record = _miss_rate_record(name, truth)
        value_key = "miss_rate"
        evaluated = None
        if record["variant"] == "cityscale":
            evaluated = {own[k] for k in np.flatnonzero(category_one(truth))}
    neighbours = {name_key(n) for v in record["neighbours"].values() for n in v}
    headline = output["levels"].get(record["headline_level"], {}).get("classes", {})
    averaged, absent = [], {}
    for k, c in enumerate(truth.classes):
        entry = headline.get(c)
        if entry is not None and entry.get(value_key) is not None:
            averaged.append(c)
        elif entry is not None:
            absent[c] = f"no counted ground-truth box at the {record['headline_level']} level"
        elif k in merged:
            absent[c] = (
                f"{MERGED} {truth.classes[merged[k]]!r} as one class: the devkit knows a "
                f"class by its name ({truth.category_names[k]!r}, in any case)"
            )
        elif own[k] in neighbours:
            absent[c] = "a neighbouring class: its boxes are ignored, not evaluated"
        elif evaluated is not None and own[k] not in evaluated:
            absent[c] = (
                "not category id 1: the city-scale code evaluates category id 1 only"
                if value_key == "miss_rate"
                else "not a class of the protocol"
            )
        else:
            absent[c] = "not evaluated"
    record["box_policy"] = predictions.box_policy
    record["averaged_classes"] = averaged
    record["absent_classes"] = absent
    return record


class _Scored:
    """What ``provenance.counts`` reads of match records: the detections scored."""

    def __init__(self, n_detections):
        self.n_detections = n_detections


def annotate_levels(output, name, truth, predictions):
    """Finish a level output: counts, the protocol record, engine version, truth
    fingerprint (the keys ``provenance.annotate`` gives every other result)."""
    record = level_record(name, truth, predictions, output)
    evaluated = [k for k, c in enumerate(truth.classes) if c not in record["absent_classes"]]
    evaluated += [
        k
        for k, c in enumerate(truth.classes)
        if record["absent_classes"].get(c, "").startswith(("no counted", MERGED))
    ]
    scored = int(np.isin(predictions.cls, evaluated).sum())
    output["counts"] = {
        **result_counts(truth, predictions, _Scored(scored)),
        "dont_care_regions": int(len(truth.region_image)),
    }
    city = record.get("variant") == "cityscale"
    if city:  # the script's np.unique, as pycocotools'
        script = "the CityPersons script (eval_MR_multisetup.py)"
        output["counts"].update(left_out_counts(truth, script))
    output["counts"].update(repeated_id_counts(truth, city))  # the script: the copies
    output["protocol_record"] = record
    output["engine_version"] = ENGINE_VERSION
    output["truth_fingerprint"] = truth.content_hash()
    return output


LEVEL_PRESETS = (*DIFFICULTY_PRESETS, *MISS_RATE_PRESETS)
#: The keys ``annotate`` and ``annotate_levels`` add to every result.
PROVENANCE_KEYS = ("counts", "protocol_record", "engine_version", "truth_fingerprint")
