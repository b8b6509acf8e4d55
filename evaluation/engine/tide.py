r"""Error breakdown following TIDE: the AP gained by fixing one type of error at a time.

Bolya et al., "TIDE: A General Toolbox for Identifying Object Detection Errors", ECCV
2020, section 2.3; the fixes as its published code does them (``tidecv`` 1.0.1,
``errors/main_errors.py``, ``TIDERun.fix_errors``):

========================  =========================================================
error type                fix
========================  =========================================================
classification            the highest-scored class or localisation error on a box no
                          detection found becomes a true positive *of the box's class*;
                          the other class errors are removed
localisation              the same, but a true positive of its own class
both                      ``fp_localisation_and_class`` detections removed
duplicate                 ``fp_duplicate`` detections removed
background                ``fp_background`` detections removed
missed                    boxes no error points at (``missed``) leave the positives
========================  =========================================================

.. math:: \Delta AP_e = AP(\text{records with errors of type } e \text{ fixed}) - AP

per class at the primary IoU slot under the protocol's own AP rule (101 points for
``coco``, 11 for ``voc07``, all-point for ``voc``, 40 for ``recall40``), and for the mean
over the classes with ground truth. Reasons come from the records (``reasons``): the
foreground threshold is the protocol's primary IoU (0.5 in every preset but
``recall40``'s vehicles), the background threshold 0.1, as published. Also given, as in
tidecv's "special" errors: ``false_positives`` (every false positive removed) and
``false_negatives`` (every missed box leaves the positives).

Conventions that differ from tidecv: it caps 100 detections per *image* over all classes
(we keep the protocol's cap); it samples 101 recall points ``k / 100`` (we use the
protocol's points); a class without ground truth but with detections counts in its mean
with AP 0 (absent here, as in every scorecard); it clamps a negative mean ΔAP to 0 (fixes
cannot lower AP here, so none is clamped); ignored detections (crowd) can be fixed into
true positives there, never here; a class whose positives all leave by the missed fix has
AP 0 there and here.
"""

import numpy as np

from .curves import TruePositivePoints, all_point_average_precision, interpolated_precision
from .protocols import get_protocol
from .reasons import BKG, BOTH, CLS, DUP, IGNORED, LOC, MISSED, MISSED_CLS, MISSED_LOC, TP
from .scoring import mean_present

ERROR_TYPES = ("classification", "localisation", "both", "duplicate", "background", "missed")
SPECIAL_TYPES = ("false_positives", "false_negatives")


def class_ap(records, protocol, det_class, det_tp, det_counted, n_pos):
    r"""AP per class at the primary slot for given per-detection flags.

    Detections are ordered by (class, score descending, then the protocol's tie order:
    image then file position, or file position) — the records' accumulation order — and
    the curve is read at true positives as ``curves.true_positive_points`` does:

    .. math:: P_i = \frac{TP_i}{TP_i + FP_i + \varepsilon}, \quad R_i = \frac{TP_i}{n_{pos}}

    NaN for a class with ``n_pos == 0``.
    """
    n_classes = len(records.classes)
    keep = np.flatnonzero(det_counted)
    cls = det_class[keep]
    if records.tie_order == "file":
        order = np.lexsort((records.det_order[keep], -records.det_score[keep], cls))
    else:
        order = np.lexsort(
            (records.det_order[keep], records.det_image[keep], -records.det_score[keep], cls)
        )
    cls, tp = cls[order], det_tp[keep][order]
    bounds = np.searchsorted(cls, np.arange(n_classes + 1))
    cum_tp = np.cumsum(tp)
    cum_all = np.arange(1, len(tp) + 1)
    start = np.repeat(bounds[:-1], np.diff(bounds))
    before_tp = np.r_[0, cum_tp][start]
    at = np.flatnonzero(tp)
    tp_count = (cum_tp - before_tp)[at]
    counted = (cum_all - start)[at]
    runs = np.searchsorted(cls[at], np.arange(n_classes + 1))
    totals = np.bincount(cls[at], minlength=n_classes)
    points = TruePositivePoints(
        tp=tp_count.astype(np.float64),
        fp=(counted - tp_count).astype(np.float64),
        runs=runs,
        n_pos=np.asarray(n_pos, np.float64),
        totals=totals[None, :].astype(np.float64),
    )
    if protocol.recall_points is None:
        return all_point_average_precision(points)[0]
    precision = interpolated_precision(
        points, protocol.recall_points, epsilon=protocol.precision_epsilon
    )
    return precision.mean(axis=1)[0]


def _fixable(records):
    """Per detection: the box its localisation / class fix turns it into a TP of, or -1
    (TIDE BestGTMatch: one per box that no true positive took, the highest-scored)."""
    out = np.full(records.n_detections, -1, np.int64)
    boxes = np.flatnonzero((records.gt_reason == MISSED_LOC) | (records.gt_reason == MISSED_CLS))
    out[records.gt_ref_det[boxes]] = boxes
    return out


def error_breakdown(records, protocol):
    """ΔAP per TIDE error type, per class and for the mean, plus the counts behind them.

    Returns
    -------
    dict: ``background_iou``; ``mean``: ``{"AP": base mean AP, "delta": {type: ΔAP}}``;
    ``per_class``: ``{name: {"AP", "delta": {type: ΔAP}, "count": {type: n}}}``;
    ``types``: the error types in display order. Absent classes are None throughout.
    """
    from .reasons import BACKGROUND_IOU

    records.require_reasons()
    protocol = get_protocol(protocol)
    reason = records.det_reason
    det_class = records.det_class.astype(np.int64)
    is_tp = reason == TP
    counted = reason != IGNORED
    n_pos = records.n_positives(0).astype(np.float64)
    present = n_pos > 0
    base = class_ap(records, protocol, det_class, is_tp, counted, n_pos)

    fixable = _fixable(records)
    box_class = records.gt_class.astype(np.int64)
    missed = records.gt_reason == MISSED
    any_missed = np.isin(records.gt_reason, (MISSED, MISSED_LOC, MISSED_CLS))

    def fixed(error):
        cls, tp, keep, positives = det_class, is_tp, counted.copy(), n_pos
        if error in ("classification", "localisation"):
            code = CLS if error == "classification" else LOC
            errors = reason == code
            found = errors & (fixable >= 0)
            keep &= ~(errors & ~found)
            tp = is_tp | found
            if code == CLS:
                cls = np.where(found, box_class[np.maximum(fixable, 0)], det_class)
        elif error in ("both", "duplicate", "background"):
            keep &= reason != {"both": BOTH, "duplicate": DUP, "background": BKG}[error]
        elif error == "false_positives":
            keep &= is_tp | ~counted
        else:
            gone = missed if error == "missed" else any_missed
            positives = n_pos - np.bincount(box_class[gone], minlength=len(records.classes)).astype(
                np.float64
            )
        ap = class_ap(records, protocol, cls, tp, keep, positives)
        # Every positive of a class left by the missed fix: no recall to read; AP 0, as
        # tidecv's APDataObject.get_ap gives for a class without positives.
        return np.where(present & (positives == 0), 0.0, ap)

    counts = {
        "classification": reason == CLS,
        "localisation": reason == LOC,
        "both": reason == BOTH,
        "duplicate": reason == DUP,
        "background": reason == BKG,
    }
    n_classes = len(records.classes)
    count_of = {e: np.bincount(det_class[mask], minlength=n_classes) for e, mask in counts.items()}
    count_of["missed"] = np.bincount(box_class[missed], minlength=n_classes)

    base_mean = mean_present(base)
    delta, per_class_delta = {}, {}
    for error in ERROR_TYPES + SPECIAL_TYPES:
        ap = fixed(error)
        delta[error] = _number(mean_present(np.where(present, ap, np.nan)) - base_mean)
        per_class_delta[error] = np.where(present, ap - base, np.nan)

    per_class = {}
    for k, name in enumerate(records.classes):
        per_class[name] = {
            "AP": _number(base[k]) if present[k] else None,
            "delta": {e: _number(per_class_delta[e][k]) for e in delta},
            "count": {e: int(count_of[e][k]) for e in ERROR_TYPES},
        }
    return {
        "background_iou": BACKGROUND_IOU,
        "types": list(ERROR_TYPES),
        "special_types": list(SPECIAL_TYPES),
        "mean": {
            "AP": _number(base_mean),
            "delta": delta,
            "count": {e: int(count_of[e].sum()) for e in ERROR_TYPES},
        },
        "per_class": per_class,
    }


def _number(value):
    value = float(value)
    return None if np.isnan(value) else value
