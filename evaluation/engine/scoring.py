"""Scores of one size bucket or slice read off the match records: the headline AP (the
cheap path for slices and bootstrap replicates) and a slice's AP, AP50, AP75 and
recall, with the helpers the whole-run scorecard (``scorecard``) shares.
"""

import numpy as np

from .average_precision import (
    all_point_average_precision,
    interpolated_precision,
    recall_point_mean,
    recall_score,
)
from .curves import true_positive_points
from .errors import InputError
from .protocols import get_protocol


def _number(value):
    value = float(value)
    return None if np.isnan(value) else value


def mean_present(values, repeats=None):
    """Mean over the entries of a class-indexed array (class axis last) that are not
    absent (NaN).

    This is pycocotools' ``mean(s[s > -1])``: the flattening order and numpy's
    pairwise summation are kept, so the result matches it bit for bit. NaN if every
    entry is absent (the reference reports -1). ``repeats`` (``MatchRecords.
    class_repeats``): per class, how many columns pycocotools' arrays give it (its
    ``p.catIds`` lists a category once per ``np.unique`` entry, each column the same);
    each class's entries count that often, its columns side by side (pycocotools puts
    them where its sort left them: equal to rounding, not bit for bit).
    """
    if repeats is not None:
        values = np.repeat(values, repeats, axis=-1)
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


def _area_arrays(records, protocol, area, weights):
    """``(points, precision or None, all-point AP or None, recall)`` of one size bucket:
    per class, nothing averaged yet (``_reduced`` does it)."""
    points = true_positive_points(
        records, area=area, max_detections=protocol.max_detections_limit, weights=weights
    )
    if protocol.recall_points is None:
        return points, None, all_point_average_precision(points), recall_score(points)
    precision = interpolated_precision(
        points, protocol.recall_points, epsilon=protocol.precision_epsilon
    )
    return points, precision, None, recall_score(points)


def _reduced(precision, ap, recall, protocol):
    """``(precision, AP per slot and class, recall)``: AP the mean over recall points
    of ``precision`` where the protocol samples them (``recall_point_mean``: the VOC
    devkit's running sum under its matching). Under that sum ``precision`` is None:
    every mean over classes then reads the AP, as the devkit's numbers are APs."""
    if precision is None:
        return None, ap, recall
    if protocol.running_recall_sum:
        return None, recall_point_mean(precision, running=True), recall
    return precision, recall_point_mean(precision), recall


def _area_scores(records, protocol, area, weights):
    points, precision, ap, recall = _area_arrays(records, protocol, area, weights)
    return (points, *_reduced(precision, ap, recall, protocol))


def headline(records, protocol, *, weights=None, area=0):
    """The headline AP (mean over present classes and all slots) and AP per class, of
    size bucket ``area`` (0: all).

    The cheap path for slices and bootstrap replicates: one size bucket, no curves.
    """
    protocol = get_protocol(protocol)
    _, precision, ap, _ = _area_scores(records, protocol, area, weights)
    mean = mean_present(precision if precision is not None else ap, records.class_repeats)
    return mean, ap.mean(axis=0)


def _slice_entry(classes, protocol, scores, mean_ap, repeats=None):
    r"""One slice's rule metrics, mean and per class, from ``(precision, ap, recall)``.

    As for the whole split (``_per_class``, ``_coco_summary``): AP is the mean over
    slots of the class's AP; AP50 / AP75 (protocols with pycocotools' summary only)
    the mean precision over the recall points at IoU 0.5 / 0.75, and their mean over
    present classes the mean of ``precision[t]`` over present classes (pycocotools
    ``summarize``: ``mean(s[s > -1])``); recall the final TP / n_pos at the protocol's
    largest cap (pycocotools ``rc[-1]``), averaged over slots, its mean over present
    classes (AR at that cap). ``repeats``: as ``mean_present``'s.
    """
    precision, ap, recall = scores
    out = {}
    mean = {"AP": _number(mean_ap), "AP50": None, "AP75": None}
    if protocol.coco_summary and precision is not None:
        for key, value in (("AP50", 0.5), ("AP75", 0.75)):
            t = _slot_of(protocol, value)
            if t is not None:
                mean[key] = _number(mean_present(precision[t : t + 1], repeats))
    mean["recall"] = _number(mean_present(recall, repeats))
    for k, name in enumerate(classes):
        row = {"AP": _number(np.mean(ap[:, k])), "AP50": None, "AP75": None}
        if protocol.coco_summary and precision is not None:
            for key, value in (("AP50", 0.5), ("AP75", 0.75)):
                t = _slot_of(protocol, value)
                if t is not None:
                    row[key] = _number(precision[t, :, k].mean())
        row["recall"] = _number(np.mean(recall[:, k]))
        out[name] = row
    return mean, out


def slice_scores(records, protocol, *, weights=None, area=0):
    """AP, AP50, AP75 and recall of one slice, mean and per class: the images of
    ``weights`` (a 0/1 tag mask, say) in size bucket ``area`` (0: all), re-accumulated
    from the records (no re-matching). ``{"AP": …, "AP50": …, "AP75": …, "recall": …,
    "classes": {name: {same keys}}}``; absent values None (see ``_slice_entry``)."""
    protocol = get_protocol(protocol)
    weights = check_weights(weights, records.n_images)
    scores = _area_scores(records, protocol, area, weights)
    precision, ap, repeats = scores[1], scores[2], records.class_repeats
    mean_ap = mean_present(precision if precision is not None else ap, repeats)
    mean, classes = _slice_entry(records.classes, protocol, scores[1:], mean_ap, repeats)
    return {**mean, "classes": classes}
