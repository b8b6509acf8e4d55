r"""Confusion matrix at a score threshold and the primary IoU, from the stored reasons.

Rows are the truth (the split's classes, then *background*: no box), columns the
prediction (the classes, then *background*: no detection). Counting the detections of
class k with score >= its threshold that are not ignored, and the non-ignored boxes:

* ``M[k, k]``: true positives of class k;
* ``M[j, k]``: class-k detections whose reason is ``fp_class`` on a box of class j
  (IoU >= t_j with it; the detection's class is wrong, its place is right);
* ``M[bg, k]``: every other false positive of class k (localisation, duplicate, both,
  background);
* ``M[j, bg]``: boxes of class j that no kept true positive found (missed at this
  threshold; greedy and best-overlap matching go by rank, so cutting at a score changes
  no match above it);
* ``M[bg, bg]`` is 0.

So column k sums to TP_k + FP_k and ``M[j, j] + M[j, bg]`` is class j's positives (common
practice for detection confusion matrices; totals as ``operating_point.counts_at``). A
box confused by a wrong-class detection is still missed for its own class, so row j can
sum to more than its positives.
"""

import numpy as np

from .reasons import CLS, IGNORED, TP


def class_thresholds(records, score_threshold, per_class=None):
    """Score threshold of each class: ``per_class[name]`` where given, else the default."""
    per_class = per_class or {}
    unknown = sorted(set(per_class) - set(records.classes))
    if unknown:
        raise ValueError(f"no such class in these records: {', '.join(unknown)}")
    return np.array([float(per_class.get(c, score_threshold)) for c in records.classes])


def _thresholds(records, thresholds):
    values = np.broadcast_to(np.asarray(thresholds, np.float64), (len(records.classes),))
    return values


def kept(records, thresholds):
    """Detections with score >= their class's threshold that count (not ignored)."""
    records.require_reasons()
    t = _thresholds(records, thresholds)
    return (records.det_score >= t[records.det_class]) & (records.det_reason != IGNORED)


def found_boxes(records, thresholds):
    """Boxes matched by a true positive that scores at or above its class's threshold."""
    t = _thresholds(records, thresholds)
    tp = np.flatnonzero((records.det_reason == TP) & (records.det_score >= t[records.det_class]))
    found = np.zeros(len(records.gt_class), bool)
    found[records.det_ref_box[tp]] = True
    return found


def _cells(records, thresholds):
    """Row and column of every kept detection, and the missed boxes."""
    k = len(records.classes)
    keep = np.flatnonzero(kept(records, thresholds))
    column = records.det_class[keep].astype(np.int64)
    reason = records.det_reason[keep]
    row = np.full(len(keep), k, np.int64)
    row[reason == TP] = column[reason == TP]
    confused = reason == CLS
    row[confused] = records.gt_class[records.det_ref_box[keep[confused]]]
    counts = ~records.gt_ignored[0]
    missed = np.flatnonzero(counts & ~found_boxes(records, thresholds))
    return keep, row, column, missed


def confusion_matrix(records, thresholds):
    """Counts ``(K + 1) x (K + 1)`` and their row-normalised view.

    Parameters
    ----------
    records : MatchRecords (with reasons)
    thresholds : float, or per class (``class_thresholds``)

    Returns
    -------
    dict: ``labels`` (classes then ``"background"``), ``counts`` (list of int rows),
    ``row_normalised`` (rows divided by their sums; None for an empty row).
    """
    k = len(records.classes)
    keep, row, column, missed = _cells(records, thresholds)
    counts = np.zeros((k + 1, k + 1), np.int64)
    np.add.at(counts, (row, column), 1)
    np.add.at(counts, (records.gt_class[missed].astype(np.int64), k), 1)
    sums = counts.sum(axis=1)
    normalised = [
        [float(v) / float(s) for v in r] if s else None for r, s in zip(counts.tolist(), sums)
    ]
    return {
        "labels": [*records.classes, "background"],
        "counts": counts.tolist(),
        "row_normalised": normalised,
    }


def cell_members(records, thresholds, row, column):
    """What a cell counts: ``{"detections": records indices, "boxes": box indices}``;
    rows and columns index ``labels`` (K = background)."""
    k = len(records.classes)
    keep, rows, columns, missed = _cells(records, thresholds)
    detections = keep[(rows == row) & (columns == column)]
    boxes = missed[records.gt_class[missed] == row] if column == k and row < k else missed[:0]
    return {"detections": detections, "boxes": boxes}
