"""From match records to a JSON-serialisable scorecard: per-class parts, assembled.

``score_records`` is ``assemble([class_parts(records, …)])``; a sharded run computes
the parts of each group of classes on its own worker (``class_groups``).
"""

from dataclasses import replace

import numpy as np

from .average_precision import interpolated_precision
from .curves import cumulative_counts, true_positive_totals
from .operating_point import (
    best_f1,
    counts_at,
    every_point_counts,
    log_average_miss_rate,
    scores_from_counts,
    threshold_scores,
    toolbox_running_counts,
)
from .protocols import get_protocol
from .scoring import (
    _area_arrays,
    _number,
    _reduced,
    _slice_entry,
    _slot_of,
    check_weights,
    mean_present,
)
from .version import ENGINE_VERSION

#: pycocotools' ``summarize`` order.
COCO_SUMMARY_KEYS = (
    "AP",
    "AP50",
    "AP75",
    "AP_small",
    "AP_medium",
    "AP_large",
    "AR1",
    "AR10",
    "AR100",
    "AR_small",
    "AR_medium",
    "AR_large",
)
CURVE_POINTS = np.linspace(0.0, 1.0, 101)


def _coco_summary(protocol, precision_by_area, recall_by_area, recall_by_cap, repeats=None):
    """The 12 numbers of pycocotools ``COCOeval.summarize`` (bbox); ``repeats`` as
    ``mean_present``'s."""
    t50, t75 = _slot_of(protocol, 0.5), _slot_of(protocol, 0.75)

    def mean(values):
        return mean_present(values, repeats)

    summary = {
        "AP": mean(precision_by_area[0]),
        "AP50": mean(precision_by_area[0][t50 : t50 + 1]),
        "AP75": mean(precision_by_area[0][t75 : t75 + 1]),
        "AP_small": mean(precision_by_area[1]),
        "AP_medium": mean(precision_by_area[2]),
        "AP_large": mean(precision_by_area[3]),
    }
    for cap in protocol.max_detections:
        summary[f"AR{cap}"] = mean(recall_by_cap[cap])
    summary["AR_small"] = mean(recall_by_area[1])
    summary["AR_medium"] = mean(recall_by_area[2])
    summary["AR_large"] = mean(recall_by_area[3])
    return {key: summary[key] for key in COCO_SUMMARY_KEYS}


def _recall_at_caps(records, protocol, weights):
    """Final recall per slot and class at each of the protocol's detection caps (AR)."""
    n_pos = records.n_positives(0, weights)
    out = {}
    for cap in protocol.max_detections:
        totals = true_positive_totals(records, area=0, max_detections=cap, weights=weights)
        with np.errstate(divide="ignore", invalid="ignore"):
            recall = totals / n_pos
        recall[:, n_pos == 0] = np.nan
        out[cap] = recall
    return out


def _class_rows(records, protocol, curves, points, score_threshold, n_images, weights):
    """Per class, everything of its scorecard row that is not a mean over slots or
    recall points (those are taken in ``assemble`` from the assembled arrays)."""
    chart = interpolated_precision(  # a chart: no undefined class (``uncounted``)
        replace(points, uncounted=None), CURVE_POINTS, epsilon=protocol.precision_epsilon, slots=[0]
    )[0]
    every = every_point_counts(
        records, max_detections=protocol.max_detections_limit, weights=weights
    )
    out = []
    for k in range(len(records.classes)):
        tp, fp, scores = curves.segment(k)
        n_pos = float(curves.n_pos[k])
        row = dict(
            iou_threshold=float(records.thresholds[0, k]),
            gt=n_pos,
            tp=float(tp[-1]) if len(tp) else 0.0,
            fp=float(fp[-1]) if len(fp) else 0.0,
        )
        reached = CURVE_POINTS <= (float(tp[-1]) / n_pos if n_pos and len(tp) else -1.0)
        row["curve"] = {
            "recall": CURVE_POINTS[reached].tolist(),
            "precision": chart[reached, k].tolist(),
        }
        row["at_threshold"] = threshold_scores(tp, fp, scores, n_pos, score_threshold)
        row["best_f1"] = best_f1(tp, fp, scores, n_pos)
        every_tp, every_fp, every_score = every.segment(k)
        every_tp, every_fp = toolbox_running_counts(every_tp, every_fp, every_score)
        row["miss_rate"] = log_average_miss_rate(every_tp, every_fp, n_pos, n_images)
        out.append(row)
    return out


def _per_class(classes, protocol, precision, ap, recall, ap_by_area, area_names, rows):
    """The per-class scorecard rows: the means of the assembled arrays first (key order
    as stored since engine 1.0), then the class's own row from ``_class_rows``."""
    t50, t75 = _slot_of(protocol, 0.5), _slot_of(protocol, 0.75)
    out = {}
    for k, name in enumerate(classes):
        row = {"AP": _number(np.mean(ap[:, k]))}
        if protocol.coco_summary:
            row["AP50"] = _number(precision[t50, :, k].mean())
            row["AP75"] = _number(precision[t75, :, k].mean())
        row["recall"] = _number(np.mean(recall[:, k]))
        for a, area_name in enumerate(area_names[1:], start=1):
            row[f"AP_{area_name}"] = _number(np.mean(ap_by_area[a][:, k]))
        row.update(rows[k])
        out[name] = row
    return out


def _threshold_counts(curves, score_threshold):
    """Per class, (TP, FP) at one shared score threshold: shape (classes, 2)."""
    counts = [counts_at(*curves.segment(k), score_threshold) for k in range(len(curves.n_pos))]
    return np.array(counts, np.float64).reshape(len(curves.n_pos), 2)


def _pooled_threshold(counts, n_pos, score_threshold):
    """Precision / recall / F1 of all classes together at one shared threshold: the
    classes' counts summed in class order."""
    tp = fp = 0.0
    for t, f in counts:
        tp, fp = tp + float(t), fp + float(f)
    return scores_from_counts(tp, fp, float(n_pos.sum()), score_threshold)


def score_records(records, protocol, *, weights=None, tag_masks=None, score_threshold=0.5):
    """The scorecard of matched detections under ``protocol``.

    Parameters
    ----------
    records : MatchRecords
    protocol : Protocol or preset name
    weights : int array (n_images,) or None
        Image multiplicities (bootstrap resample, or a 0/1 selection).
    tag_masks : dict tag -> 0/1 int array (n_images,), optional
        Adds a slice per image tag.
    score_threshold : float
        Score cut for the operating point.

    Returns
    -------
    dict with ``protocol``, ``protocol_version``, ``engine_version``, ``summary``,
    ``per_class``, ``at_threshold``, ``slices``. Absent values are None.

    ``assemble([class_parts(records, …)])``: a sharded run computes the parts of each
    group of classes on its own worker and assembles them the same way (``class_groups``).
    """
    parts = class_parts(
        records, protocol, weights=weights, tag_masks=tag_masks, score_threshold=score_threshold
    )
    return assemble([parts], protocol, score_threshold=score_threshold)


def class_parts(records, protocol, *, weights=None, tag_masks=None, score_threshold=0.5):
    """Everything of the scorecard that reads the records, per class and never across
    classes: per size bucket the interpolated precision (slots, points, classes) or
    all-point AP and final recall (slots, classes); recall at each detection cap; the
    positives; each class's counts at the threshold and its own row (curve, operating
    points, miss rate); the same arrays per image tag.

    Matching, accumulation and every curve stay inside one class, so the parts of
    records holding a contiguous run of classes equal that run of the whole run's
    parts, bit for bit; every mean over classes, slots or recall points is left to
    ``assemble`` (a reduction's summation order may follow an array's shape).

    Returns a dict: ``arrays`` (name -> array, class axis last), ``rows`` (per class),
    ``classes``, ``area_names``, ``tag_images`` (tag -> images in the slice).
    """
    protocol = get_protocol(protocol)
    weights = check_weights(weights, records.n_images)
    n_images = records.n_images if weights is None else int(weights.sum())
    arrays = {}
    points = None
    for a in range(len(records.area_names)):
        area_points, precision, ap, recall = _area_arrays(records, protocol, a, weights)
        points = area_points if a == 0 else points
        _put(arrays, f"area{a}", precision, ap, recall)
    if protocol.coco_summary:
        for cap, recall in _recall_at_caps(records, protocol, weights).items():
            arrays[f"cap{cap}.recall"] = recall
    curves = cumulative_counts(
        records, max_detections=protocol.max_detections_limit, weights=weights
    )
    if records.det_key is not None:  # cuts at a score read float64 order (exact_scores)
        curves = curves.in_score_order()
    arrays["n_pos"] = curves.n_pos
    if records.class_repeats is not None:  # joined along the class axis as the rest
        arrays["class_repeats"] = np.asarray(records.class_repeats, np.int64)
    arrays["threshold_counts"] = _threshold_counts(curves, score_threshold).T
    tag_images = {}
    for tag, mask in sorted((tag_masks or {}).items()):
        tag_weights = mask if weights is None else mask * weights
        tag_weights = check_weights(tag_weights, records.n_images)
        _, precision, ap, recall = _area_arrays(records, protocol, 0, tag_weights)
        _put(arrays, f"tag.{tag}", precision, ap, recall)
        tag_images[tag] = int(np.count_nonzero(tag_weights))
    rows = _class_rows(records, protocol, curves, points, score_threshold, n_images, weights)
    return {
        "arrays": arrays,
        "rows": rows,
        "classes": list(records.classes),
        "area_names": list(records.area_names),
        "tag_images": tag_images,
    }


def _put(arrays, prefix, precision, ap, recall):
    if precision is not None:
        arrays[f"{prefix}.precision"] = precision
    else:
        arrays[f"{prefix}.ap"] = ap
    arrays[f"{prefix}.recall"] = recall


def _get(arrays, prefix, protocol):
    return _reduced(
        arrays.get(f"{prefix}.precision"),
        arrays.get(f"{prefix}.ap"),
        arrays[f"{prefix}.recall"],
        protocol,
    )


def concatenate_parts(parts):
    """The parts of consecutive runs of classes as the parts of all of them: each array
    joined along its class axis (the last), rows and classes in order."""
    if len(parts) == 1:
        joined = dict(parts[0]["arrays"])
    else:
        joined = {
            name: np.concatenate([p["arrays"][name] for p in parts], axis=-1)
            for name in parts[0]["arrays"]
        }
    return {
        "arrays": {name: np.ascontiguousarray(value) for name, value in joined.items()},
        "rows": [row for p in parts for row in p["rows"]],
        "classes": [c for p in parts for c in p["classes"]],
        "area_names": parts[0]["area_names"],
        "tag_images": parts[0]["tag_images"],
    }


def assemble(parts, protocol, *, score_threshold=0.5):
    """The scorecard from the ``class_parts`` of consecutive runs of classes (in class
    order): the means over classes, slots and recall points of the joined arrays, which
    are the arrays one whole run builds, so its numbers are the whole run's."""
    protocol = get_protocol(protocol)
    joined = concatenate_parts(parts)
    arrays, classes, area_names = joined["arrays"], joined["classes"], joined["area_names"]
    by_area = [_get(arrays, f"area{a}", protocol) for a in range(len(area_names))]
    precision, ap, recall = by_area[0]
    ap_by_area = [entry[1] for entry in by_area]
    repeats = arrays.get("class_repeats")  # every mean over classes counts them so

    if protocol.coco_summary:
        recall_by_cap = {cap: arrays[f"cap{cap}.recall"] for cap in protocol.max_detections}
        summary = _coco_summary(
            protocol, [e[0] for e in by_area], [e[2] for e in by_area], recall_by_cap, repeats
        )
    else:
        summary = {"AP": mean_present(ap, repeats)}
        for a, name in enumerate(area_names[1:], start=1):
            summary[f"AP_{name}"] = mean_present(ap_by_area[a], repeats)
        summary["recall"] = mean_present(recall, repeats)

    result = {
        "protocol": protocol.name,
        "protocol_version": protocol.version,
        "engine_version": ENGINE_VERSION,
        "summary": {k: _number(v) for k, v in summary.items()},
        "per_class": _per_class(
            classes, protocol, precision, ap, recall, ap_by_area, area_names, joined["rows"]
        ),
        "at_threshold": _pooled_threshold(
            arrays["threshold_counts"].T, arrays["n_pos"], score_threshold
        ),
        "slices": {"size": {}, "tag": {}},
    }
    for a, name in enumerate(area_names[1:], start=1):
        mean_ap = mean_present(ap_by_area[a], repeats)
        mean, per_class = _slice_entry(classes, protocol, by_area[a], mean_ap, repeats)
        result["slices"]["size"][name] = {
            **mean,
            "per_class": {c: row["AP"] for c, row in per_class.items()},
            "classes": per_class,
        }
    for tag, images in joined["tag_images"].items():
        scores = _get(arrays, f"tag.{tag}", protocol)
        mean_ap = _headline_of(*scores, repeats)
        mean, per_class = _slice_entry(classes, protocol, scores, mean_ap, repeats)
        result["slices"]["tag"][tag] = {
            "images": images,
            **mean,
            "per_class": {c: row["AP"] for c, row in per_class.items()},
            "classes": per_class,
        }
    return result


def _headline_of(precision, ap, recall, repeats=None):
    return mean_present(precision if precision is not None else ap, repeats)
