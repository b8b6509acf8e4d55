"""Matching detections to ground truth, vectorised over images, classes and slots.

Two published rules:

* ``greedy`` (pycocotools ``COCOeval.evaluateImg``): per image and class, detections
  in descending score order (stable) each take the still-unmatched ground truth of
  highest IoU >= t; a regular box beats an ignored one, on equal IoU the later box in
  file order wins; a crowd region absorbs any number of detections.
* ``best_overlap`` (PASCAL VOC devkit ``VOCevaldet.m``): each detection looks only at
  the single box of highest overlap (first maximum wins); if that overlap >= t the
  detection is a TP when the box is free, a duplicate FP when taken, and ignored when
  the box is difficult. There is no fallback to a second-best box.

Sequential dependence exists only inside one (image, class) group, through boxes
already taken; so we walk detection *ranks* (0, 1, 2, ... within each group) and
treat every group at once at each rank. Only pairs with IoU at or above the lowest
threshold can ever match, so the rest are dropped before the walk. The rare groups
no vectorised rule reproduces (a NaN IoU, ids leaving a matched box free) are walked
by pycocotools' loop written out (``sequential_walk``). The two rules themselves, on
the candidate pairs, are in ``match_rules``.
"""

import numpy as np

from . import reasons as _reasons
from .accumulation_order import orders
from .boxes import pair_iou
from .errors import InputError
from .match_rules import best_overlap, concat, greedy
from .protocols import BEST_OVERLAP, get_protocol
from .records import MatchRecords
from .sequential_walk import refuse_unwritable_ids, walk_sequentially

_DENSE_GROUPS = 20_000_000  # up to this many (image, class) groups, index them directly


def _candidate_pairs(
    truth, det_boxes, det_group, protocol, min_threshold, left_out=None, det_corners=None
):
    """All (detection, box) pairs of one image and class with IoU >= min_threshold
    (none with a box the reading leaves out, ``left_out``); ``det_corners`` as read."""
    n_classes = len(truth.classes)
    gt_group = truth.box_image.astype(np.int64) * n_classes + truth.box_class
    gt_order = np.argsort(gt_group, kind="stable")
    n_groups = truth.n_images * n_classes
    if n_groups <= _DENSE_GROUPS:
        per_group = np.bincount(gt_group, minlength=n_groups)
        counts = per_group[det_group]
        lo = (np.cumsum(per_group) - per_group)[det_group]
    else:
        gt_sorted = gt_group[gt_order]
        lo = np.searchsorted(gt_sorted, det_group, "left")
        counts = np.searchsorted(gt_sorted, det_group, "right") - lo
    total = int(counts.sum())
    pair_det = np.repeat(np.arange(len(det_group)), counts)
    offsets = np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts)
    pair_gt = gt_order[np.repeat(lo, counts) + offsets]
    crowd = truth.crowd if protocol.matching != BEST_OVERLAP else np.zeros_like(truth.crowd)
    corners = protocol.reads_corners
    iou = pair_iou(
        det_boxes[pair_det],
        truth.boxes[pair_gt],
        crowd[pair_gt],
        pixel_offset=protocol.pixel_offset,
        det_corners=_rows(det_corners if corners else None, pair_det),
        gt_corners=_rows(truth.corners if corners else None, pair_gt),
    )
    keep = (iou >= min_threshold) | np.isnan(iou)  # NaN: see ``sequential_walk``
    if left_out is not None:
        keep &= ~left_out[pair_gt]
    return pair_det[keep], pair_gt[keep], iou[keep]


def _rows(corners, index):
    return None if corners is None else corners[index]


def _outside(area, area_ranges):
    """Per bucket, the boxes outside its closed interval (a bucket without bounds,
    ``None``, holds every box)."""
    return np.stack(
        [
            np.zeros(len(area), bool) if lo is None else (area < lo) | (area > hi)
            for _, lo, hi in area_ranges
        ]
    )


def _overflow(predictions, protocol, order):
    """``MatchRecords.det_overflow``: under the COCO order (pycocotools' ``accumulate``)
    where the file holds an integer score beyond float64's range, else None."""
    overflowing = predictions.overflowing() if protocol.tie_order == "image" else None
    return None if overflowing is None else overflowing[order]


def match(truth, predictions, protocol, *, reasons=True):
    """Match ``predictions`` to ``truth`` under ``protocol``.

    ``reasons=False`` skips the per-detection reasons (about a third of the time on
    500,000 detections), for a scorecard that keeps no records.

    Returns
    -------
    MatchRecords
        Detections beyond the protocol's per-image-and-class cap are left out, as the
        reference does. One match row per (size bucket, IoU slot, detection) that
        took a box; ``MatchRecords.outcomes`` turns them into TP / ignored flags.
        Reasons at the primary slot (``reasons.attach``) and the detection boxes are
        computed here too, so nothing downstream needs the predictions again.
    """
    protocol = get_protocol(protocol)
    conflict = predictions.score_conflict(protocol)
    if conflict:  # integer scores pycocotools orders otherwise (loaders.exact_scores)
        where = {k: v for k, v in conflict.items() if k in ("record", "field")}
        raise InputError(conflict["path"], conflict["message"], **where)
    if protocol.tie_order == "image":  # pycocotools' family: a box beyond float64
        from .loaders.beyond_float64 import truth_refusal

        refusal = truth_refusal(truth)
        if refusal:
            where = {k: v for k, v in refusal.items() if k in ("record", "field")}
            raise InputError(refusal["path"], refusal["message"], **where)
    n_classes = len(truth.classes)
    thresholds = protocol.threshold_table(truth.classes, truth.category_names)
    effective = np.minimum(thresholds, 1 - 1e-10)  # pycocotools caps at 1 - 1e-10

    scored, left_out = _reading(truth, predictions, protocol)
    positions = None
    if scored is not None and not scored.all():  # never looked up: as if not in the file
        from .shards import predictions_slice

        predictions, positions = predictions_slice(predictions, 0, 0, np.flatnonzero(scored))
    exact = predictions.score_order(protocol)
    order, rank, key = orders(predictions, n_classes, protocol.tie_order, exact)
    cap = protocol.max_detections_limit
    if cap is not None:
        keep = rank < cap
        order, rank = order[keep], rank[keep]
        key = None if key is None else key[keep]
    det_image = predictions.image[order]
    det_cls = predictions.cls[order]
    det_boxes = predictions.boxes[order]
    det_corners = _rows(predictions.corners, order)
    det_group = det_image.astype(np.int64) * n_classes + det_cls
    # inf * 0: NaN, as in loadRes; subnormal sides underflow to 0 as in C
    with np.errstate(invalid="ignore", over="ignore", under="ignore"):
        det_area = det_boxes[:, 2] * det_boxes[:, 3]
    if predictions.area is not None:  # masks, captions, keypoints: as loadRes gives it
        det_area = predictions.area[order]
    det_free = None  # ids not above 0 leave the box they match free (pycocotools' gtm > 0)
    if predictions.free is not None and protocol.zero_id_unmatched:
        det_free = predictions.free[order]

    base_ignore = truth.crowd | truth.ignore
    if protocol.difficult_ignored:
        base_ignore = base_ignore | truth.difficult
    if left_out is not None:
        base_ignore = base_ignore | left_out
    gt_ignored = base_ignore[None, :] | _outside(truth.box_area, protocol.area_ranges)
    det_outside = _outside(det_area, protocol.area_ranges)

    lowest = float(effective.min(initial=1.0))
    pair_det, pair_gt, pair_iou_ = _candidate_pairs(
        truth, det_boxes, det_group, protocol, lowest, left_out, det_corners
    )
    undefined = np.isnan(pair_iou_)
    if protocol.matching == BEST_OVERLAP:  # the devkit's "ov>ovmax" is false for NaN
        config, det, box, iou = best_overlap(
            pair_det[~undefined],
            pair_gt[~undefined],
            pair_iou_[~undefined],
            det_cls,
            effective,
            gt_ignored,
        )
    else:
        walk = np.isin(det_group[pair_det], det_group[pair_det[undefined]])
        if det_free is not None:
            walk |= np.isin(det_group[pair_det], det_group[det_free])
        config, det, box, iou = concat(
            greedy(
                pair_det[~walk],
                pair_gt[~walk],
                pair_iou_[~walk],
                rank,
                det_group,
                det_cls,
                effective,
                gt_ignored,
                truth.crowd,
                by_rank=exact is not None,
            )
            + walk_sequentially(
                np.unique(det_group[pair_det[walk]]),
                det_group,
                det_boxes,
                rank,
                det_cls,
                truth,
                protocol,
                effective,
                gt_ignored,
                det_free,
                left_out,
            )
        )

    if protocol.zero_id_unmatched:  # pycocotools' id writes: box id, detection id
        refuse_unwritable_ids(truth, predictions, order, det, box)

    records = MatchRecords(
        protocol=protocol.name,
        classes=tuple(truth.classes),
        area_names=tuple(name for name, _, _ in protocol.area_ranges),
        thresholds=thresholds,
        n_images=truth.n_images,
        det_class=det_cls.astype(np.int32),
        det_image=det_image.astype(np.int32),
        det_score=predictions.score[order],
        det_rank=rank.astype(np.int32),
        det_order=(order if positions is None else positions[order]).astype(np.int64),
        det_key=key,
        det_overflow=_overflow(predictions, protocol, order),
        det_record=None if predictions.record is None else predictions.record[order],
        det_outside=det_outside,
        match_config=config,
        match_det=det,
        match_box=box,
        match_iou=iou,
        gt_class=truth.box_class.astype(np.int32),
        gt_image=truth.box_image.astype(np.int32),
        gt_ignored=gt_ignored,
        tie_order=protocol.tie_order,
        gt_void=_void_boxes(truth, protocol),
        class_repeats=truth.class_repeats if protocol.tie_order == "image" else None,
    )
    if not reasons:
        return records
    return _reasons.attach(records, truth, det_boxes, protocol, det_corners)


def _reading(truth, predictions, protocol):
    """``(scored, left_out)``: per detection, whether the protocol's reference looks it
    up, and per box, whether it leaves it out (``GroundTruth.left_out_boxes``); None
    where every one is. pycocotools' family (``tie_order="image"``) never finds the
    images and classes its ``np.unique`` loses (``GroundTruth.unique_lost_masks``:
    their boxes count as ignored, their detections are not scored) but finds, under
    those entries, the boxes and detections written with the value numpy changed
    their id into (``GroundTruth.alias``, ``Predictions.alias``); every other reading
    keeps every id and leaves those out, as any record of an unlisted id."""
    family = protocol.tie_order == "image"
    left_out = truth.left_out_boxes(family)
    if family:
        lost = truth.unique_lost_masks()
        scored = (
            None
            if lost is None
            else truth.looked_up(predictions.image, predictions.cls, predictions.alias)
        )
    else:
        scored = None if predictions.alias is None else ~predictions.alias
    return scored, left_out


def _void_boxes(truth, protocol):
    """Boxes a match with which is no true positive (``Protocol.zero_id_unmatched``:
    annotation id 0 under ``coco``), or None when there are none."""
    if not protocol.zero_id_unmatched:
        return None
    void = truth.zero_id_boxes()
    return void if void.any() else None
