"""Ranked cumulative counts; the average-precision integrals built on them are in
``average_precision``.

One kernel serves every protocol: walk each class's detections in accumulation order
(score descending, stable), add each one's image weight to the running TP or FP sum
(ignored detections add nothing), then read precision and recall off the sums.
Weights are integer multiplicities, so the sums are exact in float64 and a weight of
2 gives bit for bit the numbers of that image included twice.

Average precision only ever reads the curve at true positives: recall rises only
there, and a false positive has lower precision than the TP before it, so it can
never be the maximum of the envelope. ``true_positive_points`` therefore computes
the counts at TPs only (a few per ground-truth box) instead of at every detection;
numbers are identical, work drops from slots x detections to slots x boxes.
"""

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class Curves:
    """Cumulative sums at every detection, for one size bucket and IoU slot.

    ``tp[i]``, ``fp[i]``: weighted TP / FP count among the detections of detection
    i's class ranked at or above i (float64). ``bounds[k]:bounds[k + 1]`` is class
    k's run; ``n_pos[k]`` its positives; ``score`` the detection scores.
    """

    tp: np.ndarray
    fp: np.ndarray
    bounds: np.ndarray
    n_pos: np.ndarray
    score: np.ndarray

    def segment(self, k):
        s, e = self.bounds[k], self.bounds[k + 1]
        return self.tp[s:e], self.fp[s:e], self.score[s:e]

    def in_score_order(self):
        """The same counts re-read by descending float64 score (stable, NaN last)
        within each class, for cuts "score >= t" (``operating_point``): differs from
        ``self`` only where accumulation order is not by float64 score (pycocotools'
        exact order of integers beyond 2**53 with int64 wrap-around, or NaN among
        exact integers: ``MatchRecords.det_key``)."""
        neg = -self.score
        by_class = np.repeat(np.arange(len(self.bounds) - 1), np.diff(self.bounds))
        order = np.lexsort((neg, by_class))  # lexsort is stable; NaN sorts last
        if np.array_equal(order, np.arange(len(order))):
            return self
        starts = self.bounds[:-1][np.diff(self.bounds) > 0]
        steps = []
        for running in (self.tp, self.fp):
            step = np.diff(np.r_[0.0, running])
            step[starts] = running[starts]  # each class's sums start from zero
            steps.append(step[order])
        tp, fp = (_relative(np.cumsum(step), self.bounds) for step in steps)
        return Curves(tp=tp, fp=fp, bounds=self.bounds, n_pos=self.n_pos, score=self.score[order])


@dataclass(frozen=True, eq=False)
class TruePositivePoints:
    """The curve at true positives only, for every IoU slot and class.

    Entries ``runs[t * K + k] : runs[t * K + k + 1]`` belong to slot t, class k, in
    rank order; ``tp`` and ``fp`` are the cumulative counts at each of them.
    ``totals[t, k]`` is the final TP count.
    """

    tp: np.ndarray
    fp: np.ndarray
    runs: np.ndarray
    n_pos: np.ndarray
    totals: np.ndarray
    #: Where pycocotools' precision fill stops (``fill_stops``; None: nowhere): per
    #: point, its detection holds an integer score beyond float64's range
    #: (``MatchRecords.det_overflow``), and per class, the first detection it
    #: accumulates does (read at recall 0).
    stop: np.ndarray | None = None
    head_stop: np.ndarray | None = None
    #: Per slot and class, whether the class has detections (of weight > 0) none of
    #: which counts, all ignored (``uncounted``); None: not computed.
    uncounted: np.ndarray | None = None

    @property
    def n_slots(self):
        return self.totals.shape[0]

    def run(self, slot, k):
        i = slot * len(self.n_pos) + k
        s, e = self.runs[i], self.runs[i + 1]
        return self.tp[s:e], self.fp[s:e]


def detection_weights(records, max_detections=None, weights=None):
    """Weight of each detection: its image's multiplicity, 0 beyond the cap."""
    w = np.ones(records.n_detections, np.int64) if weights is None else weights[records.det_image]
    if max_detections is not None:
        w = np.where(records.det_rank < max_detections, w, 0)
    return w


def _relative(cumulative, run_bounds):
    """Turn one running sum over consecutive runs into per-run running sums."""
    before = run_bounds[:-1] - 1
    base = np.where(before >= 0, cumulative[np.maximum(before, 0)] if len(cumulative) else 0, 0)
    return cumulative - np.repeat(base, np.diff(run_bounds))


def cumulative_counts(records, *, area=0, slot=0, max_detections=None, weights=None):
    r"""Weighted running TP and FP sums along each class's ranked detections.

    .. math:: TP_i = \sum_{j \le i} w_j [j \text{ is TP}], \quad
              FP_i = \sum_{j \le i} w_j [j \text{ is FP}]

    over the detections j of one class in descending score order, where w_j is the
    weight of detection j's image (pycocotools ``COCOeval.accumulate``).

    Parameters
    ----------
    records : MatchRecords
    area, slot : int, keyword-only
        Size bucket (0 = all) and IoU slot (0 = primary).
    max_detections : int or None
        Keep only detections ranked below this within their image and class.
    weights : int64 ndarray of shape (n_images,) or None
        Image multiplicities; None means 1 for every image.
    """
    w = detection_weights(records, max_detections, weights)
    is_tp, is_ignored = records.outcomes(area, slot)
    is_fp = ~(is_tp | is_ignored)
    bounds = records.class_bounds()
    tp = _relative(np.cumsum(np.where(is_tp, w, 0)), bounds)
    fp = _relative(np.cumsum(np.where(is_fp, w, 0)), bounds)
    return Curves(
        tp=tp.astype(np.float64),
        fp=fp.astype(np.float64),
        bounds=bounds,
        n_pos=records.n_positives(area, weights),
        score=records.det_score,
    )


def true_positive_points(records, *, area=0, max_detections=None, weights=None):
    r"""Cumulative TP and FP counts at every true positive, all slots at once.

    .. math:: TP_i = \sum_{j \le i} w_j [j \text{ TP}], \quad
              FP_i = \sum_{j \le i} w_j [j \text{ counted}] - TP_i

    at each true positive i of a class in accumulation order (pycocotools
    ``COCOeval.accumulate``; weights for the paired bootstrap of Efron & Tibshirani,
    1993). FP at a TP = (counted detections ranked at or above it) - TP, where a detection
    counts unless ignored. Counted totals are one running sum of the unmatched rule
    plus sparse corrections where a match changes it, so no slots x detections
    array is ever summed.

    With image weights, an image of weight w yields the points its w copies would
    (``_expanded_points``), so weighted scores equal those of the duplicated images
    exactly, tied scores included.

    Returns
    -------
    TruePositivePoints
    """
    sparse = records.sparse_outcomes(area)
    n_classes = len(records.classes)
    n_slots = records.n_slots
    w = detection_weights(records, max_detections, weights)

    if weights is not None and np.any(w > 1):
        run_bounds, tp, counted, det = _expanded_points(records, sparse, area, max_detections, w)
    else:  # every weight is 0 or 1: the TP count is the position in the run
        slot, det = sparse["tp_slot"], sparse["tp_det"]
        keep = w[det] > 0
        slot, det = slot[keep], det[keep]
        run_bounds = _run_bounds(records, slot, det)
        tp = np.arange(1, len(det) + 1) - np.repeat(run_bounds[:-1], np.diff(run_bounds))
        counter = _Counter(records, sparse, w)
        start = records.class_bounds()[records.det_class[det]] - 1
        counted = counter.upto(slot, det) - counter.upto(slot, start)
    last = run_bounds[1:] - 1
    has = np.diff(run_bounds) > 0
    totals = np.where(has, tp[np.maximum(last, 0)] if len(tp) else 0, 0)
    stop = head_stop = None
    if records.det_overflow is not None:  # scores beyond float64 (``fill_stops``)
        stop = records.det_overflow[det]
        accumulated = np.flatnonzero(w > 0)  # in accumulation order
        classes, first = np.unique(records.det_class[accumulated], return_index=True)
        head_stop = np.zeros(n_classes, bool)
        head_stop[classes] = records.det_overflow[accumulated[first]]
    return TruePositivePoints(
        tp=tp.astype(np.float64),
        fp=(counted - tp).astype(np.float64),
        runs=run_bounds,
        n_pos=records.n_positives(area, weights),
        totals=totals.reshape(n_slots, n_classes).astype(np.float64),
        stop=stop,
        head_stop=head_stop,
        uncounted=uncounted(records, sparse, w),
    )


def uncounted(records, sparse, w):
    """Per slot and class (shape (slots, classes)), whether the class has detections of
    weight ``w`` > 0 and every one of them is ignored (a difficult, crowd or
    out-of-range box): TP and FP stay 0 along its whole run."""
    present = (w > 0).astype(np.int64)
    n_classes = len(records.classes)
    bounds = records.class_bounds()
    slot = np.repeat(np.arange(records.n_slots), n_classes)
    counter = _Counter(records, sparse, present)
    counted = counter.upto(slot, np.tile(bounds[1:] - 1, records.n_slots)) - counter.upto(
        slot, np.tile(bounds[:-1] - 1, records.n_slots)
    )
    has = np.bincount(records.det_class, weights=present, minlength=n_classes) > 0
    return (counted.reshape(records.n_slots, n_classes) == 0) & has[None, :]


def _run_bounds(records, slot, det):
    n_classes = len(records.classes)
    keys = slot * n_classes + records.det_class[det]
    return np.searchsorted(keys, np.arange(records.n_slots * n_classes + 1))


def true_positive_totals(records, *, area=0, max_detections=None, weights=None):
    """Weighted TP count per slot and class, shape (slots, classes): the numerator
    of final recall, without building any curve."""
    sparse = records.sparse_outcomes(area)
    n_classes = len(records.classes)
    w = detection_weights(records, max_detections, weights)
    det = sparse["tp_det"]
    keys = sparse["tp_slot"] * n_classes + records.det_class[det]
    totals = np.bincount(keys, weights=w[det], minlength=records.n_slots * n_classes)
    return totals.reshape(records.n_slots, n_classes)


class _Counter:
    """Counted (non-ignored) detections at or before a position, per slot."""

    def __init__(self, records, sparse, w):
        self.n = records.n_detections
        self.running = np.r_[0, np.cumsum(np.where(sparse["counted"], w, 0))]
        self.keys = sparse["delta_key"]
        self.delta = np.r_[0, np.cumsum(sparse["delta_sign"] * w[sparse["delta_det"]])]

    def upto(self, slot, position):
        """Counted weight at positions ``<= position`` (position -1 gives 0)."""
        base = self.running[position + 1]
        if not len(self.keys):
            return base
        hi = np.searchsorted(self.keys, slot * self.n + position, "right")
        lo = np.searchsorted(self.keys, slot * self.n - 1, "right")
        return base + self.delta[hi] - self.delta[lo]


def _expansion_plan(records, sparse, area, max_detections):
    """Everything about the weighted points that does not depend on the weights.

    Computed once per records, size bucket and cap, so that a bootstrap replicate
    costs running sums and gathers, no search and no sort.
    """
    key = ("expansion", area, max_detections)
    if key in records._sparse:
        return records._sparse[key]
    n = records.n_detections
    static = detection_weights(records, max_detections)  # 1, or 0 beyond the cap
    slot, det = sparse["tp_slot"], sparse["tp_det"]
    keep = static[det] > 0
    slot, det = slot[keep], det[keep]
    group_start = sparse["tie_start"][det]
    group_last = sparse["tie_end"][det] - 1
    class_start = records.class_bounds()[records.det_class[det]] - 1
    single = _Counter(records, sparse, static)

    def search(sorted_keys, position):
        return np.searchsorted(sorted_keys, slot * n + position, "right")

    group_key = slot * n + group_start
    first = np.ones(len(det), bool)
    first[1:] = group_key[1:] != group_key[:-1]
    group = np.cumsum(first) - 1
    group_first = np.flatnonzero(first)
    plan = {
        "slot": slot,
        "det": det,
        "run": slot * len(records.classes) + records.det_class[det],
        "counted_prefix": single.upto(slot, det) - single.upto(slot, group_start - 1),
        "counted_group": single.upto(slot, group_last) - single.upto(slot, group_start - 1),
        "group_start": group_start,
        "class_start": class_start,
        "delta_hi": search(sparse["delta_key"], group_start - 1),
        "delta_lo": search(sparse["delta_key"], class_start),
        "group": group,
        "local": np.arange(len(det)) - group_first[group],
        "group_size": np.diff(np.r_[group_first, len(det)]),
        "group_first": group_first,
    }
    records._sparse[key] = plan
    return plan


def _expanded_points(records, sparse, area, max_detections, w):
    """TP points of the duplicated split, without duplicating anything.

    Copies of an image are adjacent in image order, so detections tied in score
    within one image and class (a *tie group*) appear copy after copy: for copy c
    the counts are (before the group, weighted) + c * (group total) + (prefix within
    the group), unweighted within the group since all of it has one image weight.

    Returns the run bounds, TP counts, counted totals and detections of the expanded
    points.
    """
    plan = _expansion_plan(records, sparse, area, max_detections)
    w_tp = w[plan["det"]]
    running = np.r_[0, np.cumsum(np.where(sparse["counted"], w, 0))]
    delta = np.r_[0, np.cumsum(sparse["delta_sign"] * w[sparse["delta_det"]])]
    counted_base = (
        running[plan["group_start"]]
        - running[plan["class_start"] + 1]
        + delta[plan["delta_hi"]]
        - delta[plan["delta_lo"]]
    )

    pick = np.repeat(np.arange(len(w_tp)), w_tp)
    det = plan["det"][pick]
    ends = np.cumsum(w_tp)
    copy = np.arange(len(pick)) - np.repeat(ends - w_tp, w_tp)
    counted = counted_base[pick] + copy * plan["counted_group"][pick] + plan["counted_prefix"][pick]
    # Entry-major order is already right except inside tie groups of several TPs
    # whose image was drawn more than once: there the copies go first (copy-major).
    tied = (plan["group_size"][plan["group"][pick]] > 1) & (w_tp[pick] > 1)
    if tied.any():
        group = plan["group"][pick[tied]]
        group_copies = plan["group_size"] * w_tp[plan["group_first"]]
        group_offset = np.cumsum(group_copies) - group_copies
        position = (
            group_offset[group] + copy[tied] * plan["group_size"][group] + plan["local"][pick[tied]]
        )
        counted[position] = counted[tied].copy()
        det[position] = det[tied].copy()
    n_runs = records.n_slots * len(records.classes)
    per_run = np.bincount(plan["run"], weights=w_tp, minlength=n_runs).astype(np.int64)
    run_bounds = np.r_[0, np.cumsum(per_run)]
    # Each point is one true positive: the TP count is the position in its run.
    tp = np.arange(1, len(pick) + 1) - np.repeat(run_bounds[:-1], per_run)
    return run_bounds, tp, counted, det
