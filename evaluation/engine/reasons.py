r"""Why each detection and each ground-truth box ended as it did, at the primary IoU.

Computed once, during matching (``matching.match``), from the protocol's own matches at
slot 0 and size bucket "all" plus one pass over every (detection, box) pair of an image
*across classes*; stored with the match records, so nothing is re-matched later.

Reasons of a detection d of class k (threshold :math:`t_k`, background threshold
:math:`t_b = 0.1`), following TIDE (Bolya et al., "TIDE: A General Toolbox for
Identifying Object Detection Errors", ECCV 2020, section 2.2, and the order in which its
published code ``tidecv`` 1.0.1 ``TIDERun._eval_image`` tests them)::

    tp                         the protocol matched d to a box of class k
    ignored                    matched to an ignored box (crowd, difficult, ignore
                               region, outside the size range), or d itself outside it
    otherwise a false positive; with s = best IoU with a class-k box (matched or not),
    o_j = IoU with a box of another class j, the first that applies:
    1 fp_localisation          t_b <= s < t_k                 (box: the best class-k box)
    2 fp_class                 some o_j >= t_j                (box: the best such box)
    3 fp_duplicate             s >= t_k: every class-k box it reaches was already taken
                               by a higher-ranked detection    (box: the best class-k box)
    4 fp_localisation_and_class  max_j o_j >= t_b             (box: the best other box)
    5 fp_background            no box overlaps it by >= t_b   (box: the best, if IoU > 0)

Only non-ignored boxes count for s and o. Intervals are half-open, so each IoU falls in
exactly one of [0, t_b), [t_b, t), [t, 1]; tidecv tests ``t_b <= s <= t`` and ``o <= t_b``
(inclusive at both ends), which differs only for an IoU exactly at a threshold. A class
error is judged at the *box's* class threshold (relabelling d would have to reach it).

A non-ignored box is ``matched`` if a true positive took it, else ``missed``; a missed box
is ``missed_localisation`` / ``missed_class`` when a localisation or class error points at
it (TIDE: fixing the highest-scored of them would find it, so it is not a missed-GT
error), else ``missed`` (TIDE's missed ground truth). Its detection is the true positive,
the highest-scored pointing error, or else the detection of highest IoU (any class) with it.
"""

import numpy as np

from .boxes import pair_iou

#: Background threshold of TIDE (Bolya et al., ECCV 2020): below it, no overlap at all.
BACKGROUND_IOU = 0.1

#: Detection reasons; the stored code is the position.
DETECTION_REASONS = (
    "tp",
    "fp_localisation",
    "fp_class",
    "fp_duplicate",
    "fp_localisation_and_class",
    "fp_background",
    "ignored",
)
TP, LOC, CLS, DUP, BOTH, BKG, IGNORED = range(7)
FALSE_POSITIVE_REASONS = DETECTION_REASONS[LOC:IGNORED]

#: Ground-truth box reasons; the stored code is the position.
BOX_REASONS = ("matched", "missed", "missed_localisation", "missed_class", "ignored")
MATCHED, MISSED, MISSED_LOC, MISSED_CLS, BOX_IGNORED = range(5)

#: Pairs of (detection, box) evaluated per step: bounds memory on crowded images.
CHUNK_PAIRS = 2_000_000


def detection_outcome(reason):
    """``tp`` / ``fp`` / ``ignored`` for an array of detection reason codes."""
    return np.array(["tp", "fp", "ignored"])[
        np.where(reason == TP, 0, np.where(reason == IGNORED, 2, 1))
    ]


def box_outcome(reason):
    """``matched`` / ``missed`` / ``ignored`` for an array of box reason codes."""
    return np.array(["matched", "missed", "ignored"])[
        np.where(reason == MATCHED, 0, np.where(reason == BOX_IGNORED, 2, 1))
    ]


def _image_pairs(truth, box_usable, det_image, det_boxes, pixel_offset, corners=None):
    """Yield ``(det, box, iou)`` for every detection and usable box of the same image
    with IoU > 0, a chunk of detections at a time (detection-major, boxes ascending);
    ``corners``: ``(detections', boxes')`` as read, or None (``Protocol.reads_corners``)."""
    det_corners, gt_corners = corners or (None, None)
    usable = np.flatnonzero(box_usable)
    order = usable[np.argsort(truth.box_image[usable], kind="stable")]
    per_image = np.bincount(truth.box_image[usable], minlength=truth.n_images)
    first = np.cumsum(per_image) - per_image
    counts = per_image[det_image]
    ends = np.cumsum(counts)
    start = 0
    n = len(det_image)
    while start < n:
        base = ends[start - 1] if start else 0
        stop = int(np.searchsorted(ends, base + CHUNK_PAIRS, "right"))
        stop = max(stop, start + 1)
        c = counts[start:stop]
        total = int(c.sum())
        det = np.repeat(np.arange(start, stop), c)
        offsets = np.arange(total) - np.repeat(np.cumsum(c) - c, c)
        box = order[np.repeat(first[det_image[start:stop]], c) + offsets]
        iou = pair_iou(
            det_boxes[det],
            truth.boxes[box],
            np.zeros(total, bool),
            pixel_offset=pixel_offset,
            det_corners=None if det_corners is None else det_corners[det],
            gt_corners=None if gt_corners is None else gt_corners[box],
        )
        keep = iou > 0
        yield det[keep], box[keep], iou[keep]
        start = stop


def _best(det, iou, box, order, mask, target_iou, target_box):
    """Per detection: the highest IoU among the masked pairs and its box (first box on
    ties, the order ``tidecv`` and MATLAB's ``max`` pick), written into the targets.
    ``order`` sorts the pairs by (detection, IoU descending, box)."""
    chosen = order[mask[order]]
    d = det[chosen]
    first = chosen[np.r_[True, d[1:] != d[:-1]]] if len(d) else chosen
    target_iou[det[first]] = iou[first]
    target_box[det[first]] = box[first]


def attach(records, truth, det_boxes, protocol, det_corners=None):
    """Compute the reasons of ``records`` (slot 0, bucket "all") and store them on it.

    ``matching.match`` calls this; records saved before reasons existed can get them
    the same way from the split and the predictions they were matched from
    (``det_boxes = predictions.boxes[records.det_order]``, ``det_corners`` alike from
    ``predictions.corners``), without re-matching.
    """
    from .protocols import get_protocol

    protocol = get_protocol(protocol)
    is_tp, is_ignored = records.outcomes(0, 0)
    chosen = records.match_config == 0
    matched_box = np.full(records.n_detections, -1, np.int64)
    matched_iou = np.full(records.n_detections, np.nan)
    matched_box[records.match_det[chosen]] = records.match_box[chosen]
    matched_iou[records.match_det[chosen]] = records.match_iou[chosen]
    primary = {
        "is_tp": is_tp,
        "is_ignored": is_ignored,
        "matched_box": matched_box,
        "matched_iou": matched_iou,
        "thresholds": np.minimum(records.thresholds[0], 1 - 1e-10),  # as matching
    }
    found = compute(
        truth,
        records.det_image,
        records.det_class,
        det_boxes,
        records.det_score,
        primary,
        records.gt_ignored[0],
        protocol.pixel_offset,
        det_order=records.det_order,
        det_key=records.det_key,
        corners=(det_corners, truth.corners) if protocol.reads_corners else None,
    )
    records.det_box = np.asarray(det_boxes, np.float64)
    for name, value in found.items():
        setattr(records, name, value)
    return records


def compute(
    truth,
    det_image,
    det_class,
    det_boxes,
    det_score,
    primary,
    gt_ignored,
    pixel_offset,
    *,
    det_order=None,
    det_key=None,
    corners=None,
):
    r"""Reason codes, related box / detection and IoU, for detections and boxes.

    Parameters
    ----------
    truth : GroundTruth
    det_image, det_class, det_boxes, det_score : arrays in accumulation order
    primary : dict with ``is_tp``, ``is_ignored`` (bool per detection) and
        ``matched_box``, ``matched_iou`` (the box each detection matched, or -1) at the
        primary slot and size bucket "all"; ``thresholds`` (per class, slot 0).
    gt_ignored : bool per box (bucket "all")
    pixel_offset : the protocol's pixel convention (0 COCO, 1 VOC)
    det_order : position of each detection in the predictions file (ties between
        errors pointing at one box go to the earlier one, as in tidecv)
    det_key : ``MatchRecords.det_key`` or None: where kept, equal float64 scores are
        ordered by it (pycocotools' exact order of integers beyond 2**53) before
        file position
    corners : ``(detections' corners, boxes' corners)`` as read (either None where the
        side has none) where the protocol reads corners (``Protocol.reads_corners``)

    Returns
    -------
    dict of arrays: ``det_reason`` (int8), ``det_ref_box`` (int32), ``det_ref_iou``,
    ``gt_reason`` (int8), ``gt_ref_det`` (int32), ``gt_ref_iou``.
    """
    n = len(det_image)
    thresholds = primary["thresholds"]
    same_iou = np.zeros(n)
    same_box = np.full(n, -1, np.int64)
    cls_iou = np.zeros(n)
    cls_box = np.full(n, -1, np.int64)
    other_iou = np.zeros(n)
    other_box = np.full(n, -1, np.int64)
    any_iou = np.zeros(n)
    any_box = np.full(n, -1, np.int64)
    n_boxes = len(gt_ignored)
    near_iou = np.zeros(n_boxes)
    near_det = np.full(n_boxes, -1, np.int64)

    def merge(target_iou, target_ref, iou, ref):
        better = iou > target_iou
        target_iou[better] = iou[better]
        target_ref[better] = ref[better]

    # Pairs come a chunk of whole detections at a time: each detection's best boxes are
    # final within its chunk; a box's best detection is merged across chunks.
    for det, box, iou in _image_pairs(
        truth, ~gt_ignored, det_image, det_boxes, pixel_offset, corners
    ):
        box_class = truth.box_class[box]
        same = det_class[det] == box_class
        order = np.lexsort((box, -iou, det))
        for mask, tgt_iou, tgt_box in (
            (same, same_iou, same_box),
            (~same & (iou >= thresholds[box_class]), cls_iou, cls_box),
            (~same, other_iou, other_box),
            (np.ones(len(det), bool), any_iou, any_box),
        ):
            _best(det, iou, box, order, mask, tgt_iou, tgt_box)
        # Best detection per box: highest IoU, earliest in accumulation order on ties.
        if len(box):
            order = np.lexsort((det, -iou, box))
            first = order[np.r_[True, box[order][1:] != box[order][:-1]]]
            merge(
                near_iou,
                near_det,
                _scatter(n_boxes, box[first], iou[first], 0.0),
                _scatter(n_boxes, box[first], det[first], -1),
            )

    t_own = thresholds[det_class]
    reason = np.select(
        [
            primary["is_tp"],
            primary["is_ignored"],
            (same_iou >= BACKGROUND_IOU) & (same_iou < t_own),
            cls_box >= 0,
            same_iou >= t_own,
            other_iou >= BACKGROUND_IOU,
        ],
        [TP, IGNORED, LOC, CLS, DUP, BOTH],
        BKG,
    ).astype(np.int8)
    ref_box = np.select(
        [
            reason == TP,
            reason == IGNORED,
            (reason == LOC) | (reason == DUP),
            reason == CLS,
            reason == BOTH,
        ],
        [primary["matched_box"], primary["matched_box"], same_box, cls_box, other_box],
        any_box,
    )
    ref_iou = np.select(
        [
            reason == TP,
            reason == IGNORED,
            (reason == LOC) | (reason == DUP),
            reason == CLS,
            reason == BOTH,
        ],
        [primary["matched_iou"], primary["matched_iou"], same_iou, cls_iou, other_iou],
        any_iou,
    )
    ref_iou = np.where(ref_box >= 0, ref_iou, np.nan)

    tie = np.arange(n) if det_order is None else det_order
    if det_key is not None:  # float64 ties in pycocotools' exact order (exact_scores)
        tie = np.lexsort((tie, det_key)).argsort()
    box_reason, box_det, box_iou = _box_reasons(
        reason, ref_box, ref_iou, det_score, tie, gt_ignored, near_det, near_iou
    )
    return {
        "det_reason": reason,
        "det_ref_box": ref_box.astype(np.int32),
        "det_ref_iou": ref_iou,
        "gt_reason": box_reason,
        "gt_ref_det": box_det.astype(np.int32),
        "gt_ref_iou": box_iou,
    }


def _scatter(size, index, values, fill):
    out = np.full(size, fill, dtype=np.asarray(values).dtype)
    out[index] = values
    return out


def _box_reasons(
    det_reason, det_ref_box, det_ref_iou, det_score, tie, gt_ignored, near_det, near_iou
):
    n_boxes = len(gt_ignored)
    reason = np.full(n_boxes, MISSED, np.int8)
    ref_det = near_det.copy()
    ref_iou = np.where(near_det >= 0, near_iou, np.nan)
    tp = np.flatnonzero(det_reason == TP)
    reason[det_ref_box[tp]] = MATCHED
    ref_det[det_ref_box[tp]] = tp
    ref_iou[det_ref_box[tp]] = det_ref_iou[tp]
    # TIDE's BestGTMatch: of the localisation and class errors pointing at an untaken
    # box, the highest-scored one (the first in the file on ties) is the one whose fix
    # finds it.
    pointing = np.flatnonzero((det_reason == LOC) | (det_reason == CLS))
    pointing = pointing[reason[det_ref_box[pointing]] == MISSED]
    if len(pointing):
        box = det_ref_box[pointing]
        order = np.lexsort((tie[pointing], -det_score[pointing], box))
        first = order[np.r_[True, box[order][1:] != box[order][:-1]]]
        chosen, chosen_box = pointing[first], box[first]
        reason[chosen_box] = np.where(det_reason[chosen] == LOC, MISSED_LOC, MISSED_CLS)
        ref_det[chosen_box] = chosen
        ref_iou[chosen_box] = det_ref_iou[chosen]
    reason[gt_ignored] = BOX_IGNORED
    ref_det[gt_ignored] = -1
    ref_iou[gt_ignored] = np.nan
    return reason, ref_det, ref_iou
