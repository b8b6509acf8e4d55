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

from .average_precision import all_point_average_precision, interpolated_precision
from .curves import TruePositivePoints
from .protocols import get_protocol
from .reasons import BKG, BOTH, CLS, DUP, IGNORED, LOC, MISSED, MISSED_CLS, MISSED_LOC, TP
from .scoring import mean_present

ERROR_TYPES = ("classification", "localisation", "both", "duplicate", "background", "missed")
SPECIAL_TYPES = ("false_positives", "false_negatives")


def class_ap(protocol, tie_order, n_classes, det, n_pos):
    r"""AP per class at the primary slot, before the mean over recall points: the
    interpolated precision (1, points, classes), or all-point AP (1, classes).

    ``det``: columns ``cls``, ``tp``, ``score``, ``image``, ``order`` of the detections
    that count. They are ordered by (class, score descending, then the protocol's tie
    order: image then file position, or file position) — the records' accumulation
    order — and the curve is read at true positives as ``curves.true_positive_points``
    does. Optional ``key`` and ``rank`` columns (``MatchRecords.det_key`` and
    ``det_rank``: pycocotools' exact order of integer scores beyond 2**53) order the
    float64 ties of a key's detections as that order does (key, image, rank); a
    detection without a key (NaN) — one the classification fix moves in, too — comes
    after them at its float64 score, then by image and file position. The float64
    score stays first, so an order that breaks it (int64 wrap-around in
    pycocotools' ``accumulate``) is not followed here (DEVELOPERS.md), nor is its
    precision fill stopping at a score beyond float64's range
    (``MatchRecords.det_overflow``: tidecv's AP keeps no score array; such a score is
    ±infinite here). The curve is read as

    .. math:: P_i = \frac{TP_i}{TP_i + FP_i + \varepsilon}, \quad R_i = \frac{TP_i}{n_{pos}}

    NaN for a class with ``n_pos == 0``. ``_ap`` takes the mean.
    """
    cls = det["cls"]
    if tie_order == "file":
        order = np.lexsort((det["order"], -det["score"], cls))
    elif "key" in det:  # pycocotools' exact order of integers beyond 2**53, kept
        exact = ~np.isnan(det["key"])
        key = np.where(exact, det["key"], np.inf)
        tie = np.where(exact, det["rank"], det["order"])
        order = np.lexsort((tie, det["image"], key, -det["score"], cls))
    else:
        order = np.lexsort((det["order"], det["image"], -det["score"], cls))
    cls, tp = cls[order], det["tp"][order]
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
        return all_point_average_precision(points)
    return interpolated_precision(
        points, protocol.recall_points, epsilon=protocol.precision_epsilon
    )


def _ap(found):
    """AP per class from ``class_ap``: the mean over recall points where sampled."""
    return found.mean(axis=1)[0] if found.ndim == 3 else found[0]


def _fixable(records):
    """Per detection: the box its localisation / class fix turns it into a TP of, or -1
    (TIDE BestGTMatch: one per box that no true positive took, the highest-scored)."""
    out = np.full(records.n_detections, -1, np.int64)
    boxes = np.flatnonzero((records.gt_reason == MISSED_LOC) | (records.gt_reason == MISSED_CLS))
    out[records.gt_ref_det[boxes]] = boxes
    return out


def moved_detections(records, fixable):
    """The class errors the classification fix turns into true positives of their box's
    class: ``class`` (the box's), ``score``, ``image``, ``order`` (file position)."""
    moved = np.flatnonzero((records.det_reason == CLS) & (fixable >= 0))
    return {
        "class": records.gt_class[fixable[moved]].astype(np.int64),
        "score": records.det_score[moved],
        "image": records.det_image[moved],
        "order": records.det_order[moved],
    }


def error_breakdown(records, protocol):
    """ΔAP per TIDE error type, per class and for the mean, plus the counts behind them.

    Returns
    -------
    dict: ``background_iou``; ``mean``: ``{"AP": base mean AP, "delta": {type: ΔAP}}``;
    ``per_class``: ``{name: {"AP", "delta": {type: ΔAP}, "count": {type: n}}}``;
    ``types``: the error types in display order. Absent classes are None throughout.

    ``assemble([class_parts(…)])``, as a sharded run does per group of classes.
    """
    records.require_reasons()
    fixable = _fixable(records)
    parts = class_parts(records, protocol, fixable >= 0, moved_detections(records, fixable))
    return assemble([parts])


def class_parts(records, protocol, has_fix, moved):
    """Per class, what the breakdown reads of the records: the ``class_ap`` arrays of the
    base and of each fix, the positives left by each fix and the count of each error.

    ``records`` may hold a run of classes only (class indices from 0); ``has_fix`` tells
    per detection whether its localisation / class fix finds a box (TIDE's BestGTMatch,
    decided within its image); ``moved`` are the class errors of *any* class whose fix
    makes them true positives of these classes (``moved_detections``, class indices
    local). Nothing here looks across classes otherwise, so the parts of consecutive runs
    of classes join into the whole run's (``assemble``).
    """
    records.require_reasons()
    protocol = get_protocol(protocol)
    n_classes = len(records.classes)
    reason = records.det_reason
    det = {
        "cls": records.det_class.astype(np.int64),
        "tp": reason == TP,
        "score": records.det_score,
        "image": records.det_image,
        "order": records.det_order,
    }
    if records.det_key is not None:
        det["key"], det["rank"] = records.det_key, records.det_rank
    counted = reason != IGNORED
    n_pos = records.n_positives(0).astype(np.float64)
    box_class = records.gt_class.astype(np.int64)
    missed = records.gt_reason == MISSED
    any_missed = np.isin(records.gt_reason, (MISSED, MISSED_LOC, MISSED_CLS))

    def ap_of(keep, tp=None, extra=None, positives=n_pos):
        columns = {k: v[keep] for k, v in det.items()}
        if tp is not None:
            columns["tp"] = tp[keep]
        if extra is not None:
            columns = {k: np.concatenate([columns[k], extra[k]]) for k in columns}
        return class_ap(protocol, records.tie_order, n_classes, columns, positives)

    arrays = {"n_pos": n_pos, "base": ap_of(counted)}
    for error in ERROR_TYPES + SPECIAL_TYPES:
        positives = n_pos
        if error == "classification":
            # every class error leaves its class; those with a box come back as true
            # positives of the box's class (``moved``, from whichever class they left)
            extra = {
                "cls": moved["class"],
                "tp": np.ones(len(moved["class"]), bool),
                "score": moved["score"],
                "image": moved["image"],
                "order": moved["order"],
            }
            if "key" in det:
                extra["key"] = np.full(len(moved["class"]), np.nan)
                extra["rank"] = np.zeros(len(moved["class"]), records.det_rank.dtype)
            found = ap_of(counted & (reason != CLS), extra=extra)
        elif error == "localisation":
            errors = reason == LOC
            found = ap_of(counted & ~(errors & ~has_fix), tp=det["tp"] | (errors & has_fix))
        elif error in ("both", "duplicate", "background"):
            code = {"both": BOTH, "duplicate": DUP, "background": BKG}[error]
            found = ap_of(counted & (reason != code))
        elif error == "false_positives":
            found = ap_of(counted & (det["tp"] | ~counted))
        else:
            gone = missed if error == "missed" else any_missed
            positives = n_pos - np.bincount(box_class[gone], minlength=n_classes).astype(np.float64)
            found = ap_of(counted, positives=positives)
        arrays[f"fixed.{error}"] = found
        arrays[f"positives.{error}"] = positives
    codes = {"classification": CLS, "localisation": LOC, "both": BOTH, "duplicate": DUP}
    codes["background"] = BKG
    for error, code in codes.items():
        arrays[f"count.{error}"] = np.bincount(det["cls"][reason == code], minlength=n_classes)
    arrays["count.missed"] = np.bincount(box_class[missed], minlength=n_classes)
    return {"arrays": arrays, "classes": list(records.classes)}


def assemble(parts):
    """The breakdown from the ``class_parts`` of consecutive runs of classes, in order."""
    from .reasons import BACKGROUND_IOU

    names = parts[0]["arrays"]
    arrays = {
        name: np.ascontiguousarray(
            np.concatenate([p["arrays"][name] for p in parts], axis=-1)
            if len(parts) > 1
            else parts[0]["arrays"][name]
        )
        for name in names
    }
    classes = [c for p in parts for c in p["classes"]]
    n_pos = arrays["n_pos"]
    present = n_pos > 0
    base = _ap(arrays["base"])
    base_mean = mean_present(base)
    delta, per_class_delta = {}, {}
    for error in ERROR_TYPES + SPECIAL_TYPES:
        ap = _ap(arrays[f"fixed.{error}"])
        # Every positive of a class left by the missed fix: no recall to read; AP 0, as
        # tidecv's APDataObject.get_ap gives for a class without positives.
        ap = np.where(present & (arrays[f"positives.{error}"] == 0), 0.0, ap)
        delta[error] = _number(mean_present(np.where(present, ap, np.nan)) - base_mean)
        per_class_delta[error] = np.where(present, ap - base, np.nan)
    count_of = {e: arrays[f"count.{e}"] for e in ERROR_TYPES}

    per_class = {}
    for k, name in enumerate(classes):
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
