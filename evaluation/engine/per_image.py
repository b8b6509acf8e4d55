r"""Per image: what each image holds at a threshold, and what it does to a class's AP.

``image_counts`` counts, per image, the kept detections by reason and the boxes missed at
the deployed score thresholds (the confusion matrix's counting, ``confusion.kept``).

``leave_one_out`` gives a class's AP with each image left out — weight 0, the mechanism
the bootstrap uses (``curves``: a weight of 0 equals leaving the image out) — so

.. math:: c_i = \Delta - \Delta_{-i}, \quad \Delta = AP_C - AP_B

is image i's contribution to the change between a candidate and a baseline
(``change_contributions``): a negative c_i is an image without which the change would
be smaller (less of a loss), an image "responsible" for a drop. The numbers are those
``scoring.headline`` gives for the same weights, bit for bit: every variant is read
with the engine's own ``average_precision.interpolated_precision`` / ``all_point_average_precision``
and averaged in the same array layout. Only images holding detections or boxes of the
class are recomputed, a batch of images at a time, each as one more "class" column. A
class holding a score beyond float64's range (``MatchRecords.det_overflow``) takes
that column path under every protocol, so ``average_precision.fill_stops`` applies to each
variant (``loo_fast`` does not model it).
"""

import numpy as np

from . import loo_fast
from .average_precision import (
    all_point_average_precision,
    interpolated_precision,
    recall_point_mean,
)
from .confusion import _thresholds, found_boxes, kept
from .curves import TruePositivePoints
from .protocols import get_protocol
from .reasons import DETECTION_REASONS, IGNORED
from .scoring import _area_scores, check_weights, headline

#: Cells of (images in a batch) x (true positives of the class) per step.
BATCH_CELLS = 4_000_000


def image_counts(records, thresholds, class_index=None):
    """Per image: kept detections by reason (``tp``, ``fp_localisation``, …) and
    ``missed`` boxes, at score >= each class's threshold and the primary IoU.

    ``class_index`` restricts to one class (a detection's own class; a box's class).
    Returns a dict of int64 arrays of shape (n_images,), plus ``fp`` (their sum).
    """
    n = records.n_images
    keep = kept(records, thresholds)
    box_counts = ~records.gt_ignored[0] & ~found_boxes(records, _thresholds(records, thresholds))
    if class_index is not None:
        keep &= records.det_class == class_index
        box_counts &= records.gt_class == class_index
    image, reason = records.det_image[keep], records.det_reason[keep]
    out = {}
    for code, name in enumerate(DETECTION_REASONS):
        if code != IGNORED:
            out[name] = np.bincount(image[reason == code], minlength=n).astype(np.int64)
    out["fp"] = sum(out[name] for name in DETECTION_REASONS[1:IGNORED])
    out["missed"] = np.bincount(records.gt_image[box_counts], minlength=n).astype(np.int64)
    return out


def _class_sequence(records, k, slot, weights, area=0):
    """Counted detections of class k at a slot and size bucket (accumulation order):
    image, TP flag."""
    s, e = records.class_bounds()[k : k + 2]
    is_tp, is_ignored = records.outcomes(area, slot)
    image = records.det_image[s:e].astype(np.int64)
    counted = ~is_ignored[s:e] & (weights[image] > 0)
    return image[counted], is_tp[s:e][counted]


def _undefined(records, protocol, k, weights, area, slots, variants):
    """Per variant (an image left out; ``records.n_images``: none), whether class k's
    AP is undefined there (``average_precision.interpolated_precision``'s rule: no epsilon, a
    recall point at 0, positives, detections, none counted in one of ``slots``), or
    None where the protocol has no such rule."""
    points = protocol.recall_points
    if points is None or protocol.precision_epsilon != 0 or min(points) > 0:
        return None
    s, e = records.class_bounds()[k : k + 2]
    image = records.det_image[s:e].astype(np.int64)
    n = records.n_images + 1

    def left(selected):  # per variant: how many remain once its image is left out
        per_image = np.bincount(selected, minlength=n)
        return len(selected) - per_image[variants]

    boxes = (~records.gt_ignored[area]) & (records.gt_class == k) & (weights[records.gt_image] > 0)
    defined = (left(records.gt_image[boxes].astype(np.int64)) == 0) | (
        left(image[weights[image] > 0]) == 0
    )
    out = np.zeros(len(variants), bool)
    for t in slots:
        out |= left(_class_sequence(records, k, t, weights, area)[0]) == 0
    return out & ~defined


def _touching(records, protocol, k, weights, touched):
    """``touched`` with, under a protocol with the undefined-class rule (``_undefined``),
    every image holding a detection of class k (leaving it out may define the class)."""
    points = protocol.recall_points
    if points is not None and protocol.precision_epsilon == 0 and min(points) <= 0:
        s, e = records.class_bounds()[k : k + 2]
        image = records.det_image[s:e].astype(np.int64)
        touched[image[weights[image] > 0]] = True
    return touched


def _class_stops(records, k, slot, weights, area=0):
    """Where class k holds a score beyond float64's range (``MatchRecords.det_overflow``),
    what ``average_precision.fill_stops`` reads of its variants: per counted detection of
    ``_class_sequence`` its flag, and the images and flags of every accumulated
    detection (ignored ones too: pycocotools' recall 0 reads the first of them);
    else None."""
    if records.det_overflow is None:
        return None
    s, e = records.class_bounds()[k : k + 2]
    flag = records.det_overflow[s:e]
    if not flag.any():
        return None
    _, is_ignored = records.outcomes(area, slot)
    image = records.det_image[s:e].astype(np.int64)
    accumulated = weights[image] > 0
    counted = ~is_ignored[s:e] & accumulated
    return flag[counted], image[accumulated], flag[accumulated]


def _variant_stops(stops, image, tp, left_out):
    """``(stop, head_stop)`` of ``_variant_points``' rows (``_class_stops``)."""
    flag, head_image, head_flag = stops
    at = np.flatnonzero(tp)
    remain = image[at][None, :] != left_out[:, None]
    stop = np.broadcast_to(flag[at][None, :], remain.shape)[remain]
    head = np.zeros(len(left_out), bool)
    if len(head_image):
        other = np.flatnonzero(head_image != head_image[0])
        head[:] = head_flag[0]
        first_image = left_out == head_image[0]
        head[first_image] = head_flag[other[0]] if len(other) else False
    return stop, head


def _variant_points(image, tp, n_pos, left_out, box_count, stops=None):
    """TruePositivePoints of one slot with one "class" per left-out image; ``stops``:
    ``_class_stops`` (scores beyond float64's range) or None."""
    at = np.flatnonzero(tp)
    n_points = len(at)
    tp_count = np.arange(1, n_points + 1)
    fp_count = at + 1 - tp_count  # counted detections up to the point, minus TPs
    point_image = image[at]
    b = len(left_out)
    row = np.arange(b)
    row_of = np.full(len(box_count), -1, np.int64)
    row_of[left_out[::-1]] = row[::-1]  # a padded duplicate: the first row is the real one
    # Image i's TPs before point j and FPs before point j, as running counts per row.
    own_tp = np.zeros((b, n_points + 1), np.int64)
    own_fp = np.zeros((b, n_points + 1), np.int64)
    rows = row_of[point_image]
    sel = rows >= 0
    np.add.at(own_tp, (rows[sel], np.flatnonzero(sel) + 1), 1)
    fp_at = np.flatnonzero(~tp)
    fp_rows = row_of[image[fp_at]]
    sel = fp_rows >= 0
    np.add.at(own_fp, (fp_rows[sel], np.searchsorted(at, fp_at[sel])), 1)
    own_tp = np.cumsum(own_tp, axis=1)[:, :n_points]
    own_fp = np.cumsum(own_fp, axis=1)[:, :n_points]
    remain = point_image[None, :] != left_out[:, None]
    tp_v = (tp_count[None, :] - own_tp)[remain]
    fp_v = (fp_count[None, :] - own_fp)[remain]
    per_row = remain.sum(axis=1)
    runs = np.r_[0, np.cumsum(per_row)]
    stop, head = (None, None) if stops is None else _variant_stops(stops, image, tp, left_out)
    return TruePositivePoints(
        tp=tp_v.astype(np.float64),
        fp=fp_v.astype(np.float64),
        runs=runs,
        n_pos=n_pos - box_count[left_out].astype(np.float64),
        totals=per_row[None, :].astype(np.float64),
        stop=stop,
        head_stop=head,
    )


def leave_one_out(records, protocol, class_index, weights=None, *, area=0, slot=None):
    """AP of class ``class_index`` (``scoring.headline``'s per-class value: the mean
    over the protocol's IoU slots) with all images, and with each image left out.

    Parameters
    ----------
    weights : 0/1 int array (n_images,) or None
        A selection of images (a tag slice); images outside it change nothing.
    area : int
        Size bucket (index into ``records.area_names``; 0 = all sizes): the class's AP
        in that bucket (the scorecard's ``AP_small`` …), boxes and detections outside
        it ignored as the protocol ignores them.
    slot : int or None
        None: the mean over the protocol's slots (AP). An int: that IoU slot's AP alone
        (the scorecard's per-class ``AP50`` at the slot of IoU 0.5), one slot's work.

    Returns
    -------
    ``(ap, without)``: a float (NaN if the class has no positives) and an array of
    shape (n_images,) (NaN where leaving the image out leaves no positives).
    """
    protocol = get_protocol(protocol)
    weights = check_weights(weights, records.n_images)
    w = np.ones(records.n_images, np.int64) if weights is None else weights
    if np.any(w > 1):
        raise ValueError("leave_one_out takes a 0/1 selection of images, not multiplicities")
    k = class_index
    slots = list(range(records.n_slots)) if slot is None else [int(slot)]
    boxes = (~records.gt_ignored[area]) & (records.gt_class == k) & (w[records.gt_image] > 0)
    box_count = np.bincount(records.gt_image[boxes], minlength=records.n_images)
    n_pos = float(box_count.sum())
    sequences = [_class_sequence(records, k, t, w, area) for t in slots]
    stops = [_class_stops(records, k, t, w, area) for t in slots]
    touched = np.zeros(records.n_images, bool)
    touched[box_count > 0] = True
    for image, _ in sequences:
        touched[image] = True
    affected = np.flatnonzero(_touching(records, protocol, k, w, touched))
    # loo_fast does not stop the fill at scores beyond float64's range: such a class
    # takes the variants' points (``_variant_points``) through average_precision.fill_stops
    fast = all(s is None for s in stops)
    if protocol.recall_points is not None and len(affected) and fast:
        # One more variant, an image id past the split's, leaves nothing out: the base.
        box_count = np.r_[box_count, 0]
        ap = _interpolated(
            records,
            protocol,
            sequences,
            n_pos,
            box_count,
            np.r_[affected, records.n_images],
            row="slot" if slot is not None else "area" if area else None,
        )
        undefined = _undefined(
            records, protocol, k, w, area, slots, np.r_[affected, records.n_images]
        )
        if undefined is not None:
            ap = np.where(undefined, np.nan, ap)
        without = np.full(records.n_images, ap[-1])
        without[affected] = ap[:-1]
        return float(ap[-1]), without
    if area == 0 and slot is None:
        base = headline(records, protocol, weights=weights)[1][k]
    else:
        base = np.mean(_area_scores(records, protocol, area, weights)[2][slots, k])
    without = np.full(records.n_images, base)
    if not len(affected):
        return float(base), without
    longest = max(int(tp.sum()) for _, tp in sequences) + 1
    size = max(2, BATCH_CELLS // longest)
    if len(records.classes) == 1:
        size = 1  # the engine's own arrays are then one column wide: reduce alike
    for start in range(0, len(affected), size):
        left_out = affected[start : start + size]
        padded = left_out if len(left_out) > 1 or size == 1 else np.r_[left_out, left_out]
        per_slot = [
            _variant_points(image, tp, n_pos, padded, box_count, stop)
            for (image, tp), stop in zip(sequences, stops)
        ]
        ap = _class_ap(per_slot, protocol)[: len(left_out)]
        undefined = _undefined(records, protocol, k, w, area, slots, left_out)
        without[left_out] = ap if undefined is None else np.where(undefined, np.nan, ap)
    return float(base), without


def leave_one_out_metrics(records, protocol, class_index, weights=None, *, area=0, slots=()):
    """``leave_one_out`` of one class for several metrics in one pass: ``{None: (ap,
    without)}`` (AP, the mean over the protocol's slots) plus one entry per IoU slot in
    ``slots`` (that slot's AP alone, ``AP50`` …), each equal to the bit to
    ``leave_one_out(records, protocol, class_index, weights, area=area, slot=s)``.

    Under interpolated-precision protocols every slot's envelopes are computed once and
    each metric is reduced from them (``_reduce``); an image that does not touch a slot
    gets the base value there, as ``leave_one_out`` gives it. Other protocols call
    ``leave_one_out`` per metric.
    """
    protocol = get_protocol(protocol)
    metrics = [None, *(int(s) for s in slots)]
    weights = check_weights(weights, records.n_images)
    w = np.ones(records.n_images, np.int64) if weights is None else weights
    k = class_index
    boxes = (~records.gt_ignored[area]) & (records.gt_class == k) & (w[records.gt_image] > 0)
    box_count = np.bincount(records.gt_image[boxes], minlength=records.n_images)
    sequences = [_class_sequence(records, k, t, w, area) for t in range(records.n_slots)]
    touched = box_count > 0
    for image, _ in sequences:
        touched[image] = True
    affected = np.flatnonzero(_touching(records, protocol, k, w, touched))
    beyond = any(_class_stops(records, k, t, w, area) is not None for t in range(records.n_slots))
    if protocol.recall_points is None or not len(affected) or np.any(w > 1) or beyond:
        return {m: leave_one_out(records, protocol, k, weights, area=area, slot=m) for m in metrics}
    variants = np.r_[affected, records.n_images]  # the last leaves nothing out: the base
    precision = _precision(
        records, protocol, sequences, float(box_count.sum()), np.r_[box_count, 0], variants
    )
    one_class = len(records.classes) == 1
    out = {}
    for m in metrics:
        if m is None:
            ap = _reduce(precision, "area" if area else None, one_class, protocol)
        else:
            ap = _reduce(precision[m : m + 1], "slot", one_class, protocol)
        slots_m = range(records.n_slots) if m is None else [m]
        undefined = _undefined(records, protocol, k, w, area, slots_m, variants)
        if undefined is not None:
            ap = np.where(undefined, np.nan, ap)
        without = np.full(records.n_images, ap[-1])
        without[affected] = ap[:-1]
        out[m] = (float(ap[-1]), without)
    return out


def _interpolated(records, protocol, sequences, n_pos, box_count, affected, row=None):
    """Leave-one-out AP of the affected images under interpolated-precision protocols,
    by ``loo_fast.envelopes``, averaged in the engine's layout (slots, points, K), or
    as the scorecard's per-class row reduces it (``row``): ``"slot"`` one slot's mean
    over recall points (``AP50``), ``"area"`` the mean over slots of one class's slot
    values (``AP_small`` …)."""
    precision = _precision(records, protocol, sequences, n_pos, box_count, affected)
    return _reduce(precision, row, len(records.classes) == 1, protocol)


def _precision(records, protocol, sequences, n_pos, box_count, affected):
    """Interpolated precision of each variant: shape (slots, recall points, variants)."""
    precision = np.empty((len(sequences), len(protocol.recall_points), len(affected)))
    for slot, (image, tp) in enumerate(sequences):
        loo_fast.envelopes(
            image,
            tp,
            n_pos,
            affected,
            box_count,
            protocol.recall_points,
            protocol.precision_epsilon,
            records.n_images + 1,
            out=precision[slot],
        )
    return precision


def _reduce(precision, row, one_class, protocol):
    """AP per variant from ``_precision``'s array, reduced as ``_interpolated`` says
    (over recall points as the scorecard reduces: ``recall_point_mean``)."""
    running = protocol.running_recall_sum
    n = precision.shape[2]
    if row == "slot":
        if running:
            return recall_point_mean(precision[0], axis=0, running=True)
        return np.ascontiguousarray(precision[0].T).mean(axis=1)
    if one_class:  # the engine's arrays are one column wide: reduce alike
        slots = [recall_point_mean(precision[:, :, v : v + 1], running=running) for v in range(n)]
        if row == "area":
            return np.array([np.mean(ap[:, 0]) for ap in slots])
        return np.array([ap.mean(axis=0)[0] for ap in slots])
    if row == "area":
        per_slot = recall_point_mean(precision, running=running)
        return np.ascontiguousarray(per_slot.T).mean(axis=1)
    if n == 1:
        precision = np.concatenate([precision, precision], axis=2)
    return recall_point_mean(precision, running=running).mean(axis=0)[:n]


def _class_ap(per_slot, protocol):
    """AP per variant, averaged over slots in the engine's layout (slots, points, K)."""
    if protocol.recall_points is None:
        ap = np.concatenate([all_point_average_precision(p) for p in per_slot], axis=0)
    else:
        precision = np.concatenate(
            [
                interpolated_precision(
                    p, protocol.recall_points, epsilon=protocol.precision_epsilon
                )
                for p in per_slot
            ],
            axis=0,
        )
        ap = recall_point_mean(precision, running=protocol.running_recall_sum)
    return ap.mean(axis=0)


def change_contributions(candidate, baseline, protocol, class_index, weights=None, **which):
    r"""Each image's contribution to the change of a class's AP between two record sets
    of one split: :math:`c_i = \Delta - \Delta_{-i}` with :math:`\Delta = AP_C - AP_B`.

    ``which``: ``area`` and ``slot`` as for ``leave_one_out``. Returns a dict:
    ``change`` (Δ), ``without`` (Δ with each image left out) and ``contribution``
    (arrays of shape (n_images,); NaN where undefined).
    """
    if candidate.n_images != baseline.n_images:
        raise ValueError("both records must come from the same split")
    ap_c, without_c = leave_one_out(candidate, protocol, class_index, weights, **which)
    ap_b, without_b = leave_one_out(baseline, protocol, class_index, weights, **which)
    change = ap_c - ap_b
    without = without_c - without_b
    return {"change": change, "without": without, "contribution": change - without}
