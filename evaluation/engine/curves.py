"""Ranked cumulative counts and the average-precision integrals built on them.

One kernel serves every protocol: walk each class's detections in accumulation order
(score descending, stable), add each one's image weight to the running TP or FP sum
(ignored detections add nothing), then read precision and recall off the sums.
Weights are integer multiplicities, so the sums are exact in float64 and a weight of
2 gives bit for bit the numbers of that image included twice.
"""

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class Curves:
    """Cumulative sums for one size bucket and detection cap.

    ``tp[t, i]``, ``fp[t, i]``: weighted TP / FP count among the detections of
    detection i's class ranked at or above i, at IoU slot t (float64).
    ``bounds[k]:bounds[k + 1]`` is class k's run; ``n_pos[k]`` its positives.
    """

    tp: np.ndarray
    fp: np.ndarray
    bounds: np.ndarray
    n_pos: np.ndarray
    score: np.ndarray

    def segment(self, slot, k):
        s, e = self.bounds[k], self.bounds[k + 1]
        return self.tp[slot, s:e], self.fp[slot, s:e]


def _detection_weights(records, max_detections, weights):
    w = np.ones(records.n_detections, np.int64) if weights is None else weights[records.det_image]
    if max_detections is not None:
        w = np.where(records.det_rank < max_detections, w, 0)
    return w


def cumulative_counts(records, *, area=0, max_detections=None, weights=None):
    """Weighted running TP and FP sums along each class's ranked detections.

    .. math:: TP_i = \\sum_{j \\le i} w_j [j \\text{ is TP}], \\quad
              FP_i = \\sum_{j \\le i} w_j [j \\text{ is FP}]

    over the detections j of one class in descending score order, where w_j is the
    weight of detection j's image (pycocotools ``COCOeval.accumulate``; weights give
    the paired bootstrap of Efron & Tibshirani, 1993, without re-matching).

    Parameters
    ----------
    records : MatchRecords
    area : int, keyword-only
        Size bucket index (0 = all).
    max_detections : int or None
        Keep only detections ranked below this within their image and class.
    weights : int64 ndarray of shape (n_images,) or None
        Image multiplicities; None means 1 for every image.

    Returns
    -------
    Curves
    """
    w = _detection_weights(records, max_detections, weights)
    tp_flags = records.tp[area]
    fp_flags = ~(tp_flags | records.ignored[area])
    tp = np.cumsum(tp_flags * w, axis=1)
    fp = np.cumsum(fp_flags * w, axis=1)
    bounds = records.class_bounds()
    counts = np.diff(bounds)
    before = bounds[:-1] - 1
    for cum in (tp, fp):
        base = np.where(before >= 0, cum[:, np.maximum(before, 0)], 0)
        cum -= np.repeat(base, counts, axis=1)
    return Curves(
        tp=tp.astype(np.float64),
        fp=fp.astype(np.float64),
        bounds=bounds,
        n_pos=records.n_positives(area, weights),
        score=records.det_score,
    )


def true_positive_totals(records, *, area=0, max_detections=None, weights=None):
    """Total weighted TP per slot and class, shape (slots, classes)."""
    w = _detection_weights(records, max_detections, weights)
    n_classes = len(records.classes)
    return np.stack(
        [
            np.bincount(records.det_class, weights=row * w, minlength=n_classes)
            for row in records.tp[area]
        ]
    )


def recall_score(curves, totals=None):
    """Final recall TP / n_pos per slot and class; NaN where a class has no positives.

    pycocotools reports ``rc[-1]`` (0 without detections); the same number is the
    total TP over n_pos because TP sums are exact integers.
    """
    if totals is None:
        last = curves.bounds[1:] - 1
        has = np.diff(curves.bounds) > 0
        totals = np.where(has, curves.tp[:, np.maximum(last, 0)], 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        recall = totals / curves.n_pos
    recall[:, curves.n_pos == 0] = np.nan
    return recall


def _precision(tp, fp, epsilon):
    if epsilon:
        return tp / (fp + tp + epsilon)
    with np.errstate(divide="ignore", invalid="ignore"):
        precision = tp / (fp + tp)
    return np.nan_to_num(precision, nan=0.0)


def envelope(precision):
    """Running maximum from the right: the monotone precision envelope.

    .. math:: \\hat p_i = \\max_{j \\ge i} p_j
    """
    return np.maximum.accumulate(precision[::-1])[::-1]


def interpolated_precision(curves, recall_points, *, epsilon=0.0):
    """Envelope precision at each recall point, shape (slots, points, classes).

    .. math:: p_{\\mathrm{interp}}(r) = \\max_{i : R_i \\ge r} P_i, \\quad
              P_i = \\frac{TP_i}{TP_i + FP_i + \\varepsilon}, \\quad R_i = \\frac{TP_i}{n_{pos}}

    0 when no point reaches r; NaN for a class without positives (absent). With
    ``epsilon`` = float64 machine epsilon and the 101 points of ``linspace(0, 1, 101)``
    this is pycocotools' ``precision`` array; 11 points k/10 give VOC 2007
    (Everingham et al., IJCV 2010), 40 points k/40 give Simonelli et al. (ICCV 2019).

    Examples
    --------
    A single detection that is correct, with one positive: precision 1 up to recall 1.

    >>> import numpy as np
    >>> c = Curves(np.array([[1.]]), np.array([[0.]]), np.array([0, 1]), np.array([1.]), None)
    >>> interpolated_precision(c, [0.0, 0.5, 1.0])[0, :, 0].tolist()
    [1.0, 1.0, 1.0]
    """
    recall_points = np.asarray(recall_points, dtype=np.float64)
    n_slots, n_classes = curves.tp.shape[0], len(curves.n_pos)
    out = np.zeros((n_slots, len(recall_points), n_classes))
    for k in range(n_classes):
        if curves.n_pos[k] == 0:
            out[:, :, k] = np.nan
            continue
        for t in range(n_slots):
            tp, fp = curves.segment(t, k)
            if not len(tp):
                continue
            recall = tp / curves.n_pos[k]
            env = envelope(_precision(tp, fp, epsilon))
            index = np.searchsorted(recall, recall_points, side="left")
            reached = index < len(tp)
            out[t, reached, k] = env[index[reached]]
    return out


def all_point_average_precision(curves):
    """Area under the precision envelope, shape (slots, classes) (VOC 2010+).

    .. math:: AP = \\sum_i (r_i - r_{i-1})\\, \\hat p_i

    over the points where recall changes, with sentinels (0, 0) before the first
    point and (1, 0) after the last (PASCAL VOC devkit ``VOCap.m``). Precision is
    TP / (TP + FP) without epsilon, as in the devkit; NaN for absent classes.
    """
    n_slots, n_classes = curves.tp.shape[0], len(curves.n_pos)
    out = np.zeros((n_slots, n_classes))
    for k in range(n_classes):
        if curves.n_pos[k] == 0:
            out[:, k] = np.nan
            continue
        for t in range(n_slots):
            tp, fp = curves.segment(t, k)
            if not len(tp):
                continue
            recall = np.r_[0.0, tp / curves.n_pos[k], 1.0]
            env = envelope(np.r_[0.0, _precision(tp, fp, 0.0), 0.0])
            change = np.flatnonzero(recall[1:] != recall[:-1]) + 1
            out[t, k] = np.sum((recall[change] - recall[change - 1]) * env[change])
    return out


def average_precision(curves, protocol):
    """AP per slot and class under ``protocol``: mean interpolated precision over its
    recall points, or the all-point area when it has none. NaN = absent class."""
    if protocol.recall_points is None:
        return all_point_average_precision(curves)
    precision = interpolated_precision(
        curves, protocol.recall_points, epsilon=protocol.precision_epsilon
    )
    return precision.mean(axis=1)
