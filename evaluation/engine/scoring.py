"""From match records to a JSON-serialisable scorecard."""

import numpy as np

from .curves import (
    all_point_average_precision,
    cumulative_counts,
    interpolated_precision,
    recall_score,
    true_positive_points,
    true_positive_totals,
)
from .errors import InputError
from .operating_point import (
    best_f1,
    counts_at,
    every_point_counts,
    log_average_miss_rate,
    scores_from_counts,
    threshold_scores,
)
from .protocols import get_protocol
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


def _number(value):
    value = float(value)
    return None if np.isnan(value) else value


def mean_present(values):
    """Mean over the entries of a class-indexed array that are not absent (NaN).

    This is pycocotools' ``mean(s[s > -1])``: the flattening order and numpy's
    pairwise summation are kept, so the result matches it bit for bit. NaN if every
    entry is absent (the reference reports -1).
    """
    present = values[~np.isnan(values)]
    return float(np.mean(present)) if present.size else float("nan")


def check_weights(weights, n_images):
    """Image multiplicities as int64; errors name what is wrong."""
    if weights is None:
        return None
    array = np.asarray(weights)
    if array.shape != (n_images,):
        raise InputError("weights", f"expected {n_images} image weights, got shape {array.shape}")
    if array.dtype.kind == "f":
        if not np.all(np.isfinite(array)) or np.any(array != np.round(array)):
            raise InputError("weights", "weights are image multiplicities and must be integers")
    elif array.dtype.kind not in "iub":
        raise InputError("weights", f"weights must be integers, got dtype {array.dtype}")
    if np.any(array < 0):
        raise InputError("weights", "weights must be >= 0")
    return array.astype(np.int64)


def _slot_of(protocol, value):
    matches = [i for i, t in enumerate(protocol.iou_thresholds) if t == value]
    return matches[0] if matches else None


def _coco_summary(records, protocol, precision_by_area, recall_by_area, weights):
    """The 12 numbers of pycocotools ``COCOeval.summarize`` (bbox)."""
    t50, t75 = _slot_of(protocol, 0.5), _slot_of(protocol, 0.75)
    summary = {
        "AP": mean_present(precision_by_area[0]),
        "AP50": mean_present(precision_by_area[0][t50 : t50 + 1]),
        "AP75": mean_present(precision_by_area[0][t75 : t75 + 1]),
        "AP_small": mean_present(precision_by_area[1]),
        "AP_medium": mean_present(precision_by_area[2]),
        "AP_large": mean_present(precision_by_area[3]),
    }
    n_pos = records.n_positives(0, weights)
    for cap in protocol.max_detections:
        totals = true_positive_totals(records, area=0, max_detections=cap, weights=weights)
        with np.errstate(divide="ignore", invalid="ignore"):
            recall = totals / n_pos
        recall[:, n_pos == 0] = np.nan
        summary[f"AR{cap}"] = mean_present(recall)
    summary["AR_small"] = mean_present(recall_by_area[1])
    summary["AR_medium"] = mean_present(recall_by_area[2])
    summary["AR_large"] = mean_present(recall_by_area[3])
    return {key: summary[key] for key in COCO_SUMMARY_KEYS}


def _per_class(
    records,
    protocol,
    curves,
    points,
    ap,
    precision,
    recall,
    ap_by_area,
    score_threshold,
    n_images,
    weights,
):
    t50, t75 = _slot_of(protocol, 0.5), _slot_of(protocol, 0.75)
    chart = interpolated_precision(
        points, CURVE_POINTS, epsilon=protocol.precision_epsilon, slots=[0]
    )[0]
    every = every_point_counts(
        records, max_detections=protocol.max_detections_limit, weights=weights
    )
    out = {}
    for k, name in enumerate(records.classes):
        tp, fp, scores = curves.segment(k)
        n_pos = float(curves.n_pos[k])
        row = {"AP": _number(np.mean(ap[:, k]))}
        if protocol.coco_summary:
            row["AP50"] = _number(precision[t50, :, k].mean())
            row["AP75"] = _number(precision[t75, :, k].mean())
        row["recall"] = _number(np.mean(recall[:, k]))
        for a, area_name in enumerate(records.area_names[1:], start=1):
            row[f"AP_{area_name}"] = _number(np.mean(ap_by_area[a][:, k]))
        row.update(
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
        every_tp, every_fp, _ = every.segment(k)
        row["miss_rate"] = log_average_miss_rate(every_tp, every_fp, n_pos, n_images)
        out[name] = row
    return out


def _pooled_threshold(curves, score_threshold):
    """Precision / recall / F1 of all classes together at one shared threshold."""
    tp = fp = 0.0
    for k in range(len(curves.n_pos)):
        t, f = counts_at(*curves.segment(k), score_threshold)
        tp, fp = tp + t, fp + f
    return scores_from_counts(tp, fp, float(curves.n_pos.sum()), score_threshold)


def _area_scores(records, protocol, area, weights):
    points = true_positive_points(
        records, area=area, max_detections=protocol.max_detections_limit, weights=weights
    )
    precision = None
    if protocol.recall_points is None:
        ap = all_point_average_precision(points)
    else:
        precision = interpolated_precision(
            points, protocol.recall_points, epsilon=protocol.precision_epsilon
        )
        ap = precision.mean(axis=1)
    return points, precision, ap, recall_score(points)


def headline(records, protocol, *, weights=None, area=0):
    """The headline AP (mean over present classes and all slots) and AP per class, of
    size bucket ``area`` (0: all).

    The cheap path for slices and bootstrap replicates: one size bucket, no curves.
    """
    protocol = get_protocol(protocol)
    _, precision, ap, _ = _area_scores(records, protocol, area, weights)
    mean = mean_present(precision) if precision is not None else mean_present(ap)
    return mean, ap.mean(axis=0)


def _slice_entry(records, protocol, scores, mean_ap):
    r"""One slice's rule metrics, mean and per class, from one ``_area_scores``.

    As for the whole split (``_per_class``, ``_coco_summary``): AP is the mean over
    slots of the class's AP; AP50 / AP75 (protocols with pycocotools' summary only)
    the mean precision over the recall points at IoU 0.5 / 0.75, and their mean over
    present classes the mean of ``precision[t]`` over present classes (pycocotools
    ``summarize``: ``mean(s[s > -1])``); recall the final TP / n_pos at the protocol's
    largest cap (pycocotools ``rc[-1]``), averaged over slots, its mean over present
    classes (AR at that cap).
    """
    _, precision, ap, recall = scores
    classes = {}
    mean = {"AP": _number(mean_ap), "AP50": None, "AP75": None}
    if protocol.coco_summary and precision is not None:
        for key, value in (("AP50", 0.5), ("AP75", 0.75)):
            t = _slot_of(protocol, value)
            if t is not None:
                mean[key] = _number(mean_present(precision[t : t + 1]))
    mean["recall"] = _number(mean_present(recall))
    for k, name in enumerate(records.classes):
        row = {"AP": _number(np.mean(ap[:, k])), "AP50": None, "AP75": None}
        if protocol.coco_summary and precision is not None:
            for key, value in (("AP50", 0.5), ("AP75", 0.75)):
                t = _slot_of(protocol, value)
                if t is not None:
                    row[key] = _number(precision[t, :, k].mean())
        row["recall"] = _number(np.mean(recall[:, k]))
        classes[name] = row
    return mean, classes


def slice_scores(records, protocol, *, weights=None, area=0):
    """AP, AP50, AP75 and recall of one slice, mean and per class: the images of
    ``weights`` (a 0/1 tag mask, say) in size bucket ``area`` (0: all), re-accumulated
    from the records (no re-matching). ``{"AP": …, "AP50": …, "AP75": …, "recall": …,
    "classes": {name: {same keys}}}``; absent values None (see ``_slice_entry``)."""
    protocol = get_protocol(protocol)
    weights = check_weights(weights, records.n_images)
    scores = _area_scores(records, protocol, area, weights)
    precision, ap = scores[1], scores[2]
    mean_ap = mean_present(precision) if precision is not None else mean_present(ap)
    mean, classes = _slice_entry(records, protocol, scores, mean_ap)
    return {**mean, "classes": classes}


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
    """
    protocol = get_protocol(protocol)
    weights = check_weights(weights, records.n_images)
    n_images = records.n_images if weights is None else int(weights.sum())

    by_area = [_area_scores(records, protocol, a, weights) for a in range(len(records.area_names))]
    points, precision, ap, recall = by_area[0]
    curves = cumulative_counts(
        records, max_detections=protocol.max_detections_limit, weights=weights
    )
    ap_by_area = [entry[2] for entry in by_area]

    if protocol.coco_summary:
        summary = _coco_summary(
            records, protocol, [e[1] for e in by_area], [e[3] for e in by_area], weights
        )
    else:
        summary = {"AP": mean_present(ap)}
        for a, name in enumerate(records.area_names[1:], start=1):
            summary[f"AP_{name}"] = mean_present(ap_by_area[a])
        summary["recall"] = mean_present(recall)

    result = {
        "protocol": protocol.name,
        "protocol_version": protocol.version,
        "engine_version": ENGINE_VERSION,
        "summary": {k: _number(v) for k, v in summary.items()},
        "per_class": _per_class(
            records,
            protocol,
            curves,
            points,
            ap,
            precision,
            recall,
            ap_by_area,
            score_threshold,
            n_images,
            weights,
        ),
        "at_threshold": _pooled_threshold(curves, score_threshold),
        "slices": {"size": {}, "tag": {}},
    }
    for a, name in enumerate(records.area_names[1:], start=1):
        mean, classes = _slice_entry(records, protocol, by_area[a], mean_present(ap_by_area[a]))
        result["slices"]["size"][name] = {
            **mean,
            "per_class": {c: row["AP"] for c, row in classes.items()},
            "classes": classes,
        }
    for tag, mask in sorted((tag_masks or {}).items()):
        tag_weights = mask if weights is None else mask * weights
        entry = slice_scores(records, protocol, weights=tag_weights)
        classes = entry.pop("classes")
        result["slices"]["tag"][tag] = {
            "images": int(np.count_nonzero(tag_weights)),
            **entry,
            "per_class": {c: row["AP"] for c, row in classes.items()},
            "classes": classes,
        }
    return result
