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
threshold can ever match, so the rest are dropped before the walk.
"""

import numpy as np

from .boxes import pair_iou
from .protocols import BEST_OVERLAP
from .records import MatchRecords

_RANK_KEY = np.int64(1) << 32


def _group_order(group, score):
    """Indices sorting by group, then score descending, then file order (stable)."""
    order = np.argsort(-score, kind="stable")
    return order[np.argsort(group[order], kind="stable")]


def _ranks(sorted_group):
    n = len(sorted_group)
    starts = np.flatnonzero(np.r_[True, sorted_group[1:] != sorted_group[:-1]]) if n else []
    counts = np.diff(np.r_[starts, n])
    return np.arange(n) - np.repeat(starts, counts)


def _candidate_pairs(truth, det_boxes, det_group, protocol, min_threshold):
    """All (detection, box) pairs of one image and class with IoU >= min_threshold."""
    n_classes = len(truth.classes)
    gt_group = truth.box_image.astype(np.int64) * n_classes + truth.box_class
    gt_order = np.argsort(gt_group, kind="stable")
    gt_sorted = gt_group[gt_order]
    lo = np.searchsorted(gt_sorted, det_group, "left")
    counts = np.searchsorted(gt_sorted, det_group, "right") - lo
    total = int(counts.sum())
    pair_det = np.repeat(np.arange(len(det_group)), counts)
    offsets = np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts)
    pair_gt = gt_order[np.repeat(lo, counts) + offsets]
    crowd = truth.crowd if protocol.matching != BEST_OVERLAP else np.zeros_like(truth.crowd)
    iou = pair_iou(
        det_boxes[pair_det],
        truth.boxes[pair_gt],
        crowd[pair_gt],
        pixel_offset=protocol.pixel_offset,
    )
    keep = iou >= min_threshold
    return pair_det[keep], pair_gt[keep], iou[keep]


def _outside(area, area_ranges):
    return np.stack([(area < lo) | (area > hi) for _, lo, hi in area_ranges])


def match(truth, predictions, protocol):
    """Match ``predictions`` to ``truth`` under ``protocol``.

    Returns
    -------
    MatchRecords
        Detections beyond the protocol's per-image-and-class cap are left out, as the
        reference does. ``tp[a, t, i]``: detection i is a true positive for size
        bucket a and IoU slot t; ``ignored``: it counts neither way (it matched an
        ignored box, or is unmatched with an area outside the bucket).
    """
    n_classes = len(truth.classes)
    thresholds = protocol.threshold_table(truth.classes)
    effective = np.minimum(thresholds, 1 - 1e-10)  # pycocotools caps at 1 - 1e-10
    n_slots, n_areas = len(thresholds), len(protocol.area_ranges)

    det_group = predictions.image.astype(np.int64) * n_classes + predictions.cls
    order = _group_order(det_group, predictions.score)
    rank = _ranks(det_group[order])
    cap = protocol.max_detections_limit
    if cap is not None:
        keep = rank < cap
        order, rank = order[keep], rank[keep]
    det_group = det_group[order]
    det_cls = predictions.cls[order]
    det_boxes = predictions.boxes[order]
    det_area = det_boxes[:, 2] * det_boxes[:, 3]
    n_det = len(order)

    base_ignore = truth.crowd | truth.ignore | truth.difficult
    gt_ignored = base_ignore[None, :] | _outside(truth.box_area, protocol.area_ranges)
    det_outside = _outside(det_area, protocol.area_ranges)

    pair_det, pair_gt, pair_iou_ = _candidate_pairs(
        truth, det_boxes, det_group, protocol, float(effective.min(initial=1.0))
    )
    if protocol.matching == BEST_OVERLAP:
        matched, tp, ignored = _best_overlap(
            pair_det, pair_gt, pair_iou_, det_cls, effective, gt_ignored, det_outside, n_det
        )
    else:
        matched, tp, ignored = _greedy(
            pair_det, pair_gt, pair_iou_, rank, det_cls, effective,
            gt_ignored, det_outside, truth.crowd, n_det,
        )

    matched_iou = np.zeros(n_det)
    hit = np.flatnonzero(matched[0] >= 0)
    if len(hit):
        pair_key = pair_det * truth.n_boxes + pair_gt
        by_key = np.argsort(pair_key)
        where = np.searchsorted(pair_key[by_key], hit * truth.n_boxes + matched[0][hit])
        matched_iou[hit] = pair_iou_[by_key[where]]

    det_score = predictions.score[order]
    det_image = predictions.image[order]
    acc = np.argsort(-det_score, kind="stable")  # (image, class, file) order survives ties
    acc = acc[np.argsort(det_cls[acc], kind="stable")]
    return MatchRecords(
        protocol=protocol.name,
        classes=tuple(truth.classes),
        area_names=tuple(name for name, _, _ in protocol.area_ranges),
        thresholds=thresholds,
        n_images=truth.n_images,
        det_class=det_cls[acc].astype(np.int32),
        det_image=det_image[acc].astype(np.int32),
        det_score=det_score[acc],
        det_rank=rank[acc].astype(np.int32),
        det_order=order[acc].astype(np.int64),
        tp=tp.reshape(n_areas, n_slots, n_det)[:, :, acc],
        ignored=ignored.reshape(n_areas, n_slots, n_det)[:, :, acc],
        matched_gt=matched[:n_slots][:, acc].astype(np.int32),
        matched_iou=matched_iou[acc],
        gt_class=truth.box_class.astype(np.int32),
        gt_image=truth.box_image.astype(np.int32),
        gt_ignored=gt_ignored,
    )


def _status(matched, gt_ignored, det_outside, n_slots):
    """TP / ignored flags from matches, config c = area * n_slots + slot."""
    area_of_config = np.repeat(np.arange(len(gt_ignored)), n_slots)
    is_matched = matched >= 0
    safe = np.where(is_matched, matched, 0)
    ignored = np.where(
        is_matched,
        gt_ignored[area_of_config[:, None], safe],
        det_outside[area_of_config],
    )
    return is_matched & ~ignored, ignored


def _greedy(pair_det, pair_gt, pair_iou_, rank, det_cls, effective,
            gt_ignored, det_outside, crowd, n_det):
    n_slots, n_areas = len(effective), len(gt_ignored)
    n_configs = n_slots * n_areas
    matched = np.full((n_configs, n_det), -1, np.int64)
    taken = np.zeros((n_configs, gt_ignored.shape[1]), bool)
    regular = np.repeat((~gt_ignored).astype(np.int64), n_slots, axis=0) * _RANK_KEY

    # Within each detection: ascending IoU, then file order, so the *last* maximum
    # (the reference's tie rule) has the highest static rank.
    by_det = np.lexsort((pair_gt, pair_iou_, pair_det))
    pair_det, pair_gt, pair_iou_ = pair_det[by_det], pair_gt[by_det], pair_iou_[by_det]
    first_pair = np.searchsorted(pair_det, pair_det, "left")
    static_rank = np.arange(len(pair_det)) - first_pair
    by_rank = np.argsort(rank[pair_det], kind="stable")
    pair_det, pair_gt, pair_iou_, static_rank = (
        a[by_rank] for a in (pair_det, pair_gt, pair_iou_, static_rank)
    )
    pair_rank = rank[pair_det]
    bounds = np.flatnonzero(np.r_[True, pair_rank[1:] != pair_rank[:-1], True])
    for b0, b1 in zip(bounds[:-1], bounds[1:]):
        d, g = pair_det[b0:b1], pair_gt[b0:b1]
        starts = np.flatnonzero(np.r_[True, d[1:] != d[:-1]])
        reaches = pair_iou_[b0:b1] >= effective[:, det_cls[d]]  # (slots, pairs)
        available = ~taken[:, g] | crowd[g]
        eligible = available & np.tile(reaches, (n_areas, 1))
        key = np.where(eligible, regular[:, g] + static_rank[b0:b1] + 1, 0)
        best = np.maximum.reduceat(key, starts, axis=1)
        config, det = np.nonzero(best)
        chosen = starts[det] + (best[config, det] - 1) % _RANK_KEY
        box = g[chosen]
        taken[config, box] = True
        matched[config, d[starts[det]]] = box
    tp, ignored = _status(matched, gt_ignored, det_outside, n_slots)
    return matched, tp, ignored


def _best_overlap(pair_det, pair_gt, pair_iou_, det_cls, effective,
                  gt_ignored, det_outside, n_det):
    n_slots, n_areas = len(effective), len(gt_ignored)
    # Highest overlap per detection; on ties the first box in file order (MATLAB max).
    by_det = np.lexsort((pair_gt, -pair_iou_, pair_det))
    pair_det, pair_gt, pair_iou_ = pair_det[by_det], pair_gt[by_det], pair_iou_[by_det]
    first = np.r_[True, pair_det[1:] != pair_det[:-1]]
    best_gt = np.full(n_det, -1, np.int64)
    best_iou = np.full(n_det, -1.0)
    best_gt[pair_det[first]] = pair_gt[first]
    best_iou[pair_det[first]] = pair_iou_[first]

    matched = np.full((n_slots * n_areas, n_det), -1, np.int64)
    tp = np.zeros((n_slots * n_areas, n_det), bool)
    ignored = np.zeros((n_slots * n_areas, n_det), bool)
    safe_gt = np.where(best_gt >= 0, best_gt, 0)
    for a in range(n_areas):
        box_ignored = gt_ignored[a, safe_gt]
        for t in range(n_slots):
            c = a * n_slots + t
            reaches = (best_gt >= 0) & (best_iou >= effective[t, det_cls])
            ignored[c] = np.where(reaches, box_ignored, det_outside[a])
            candidates = np.flatnonzero(reaches & ~box_ignored)
            # Detections are in (image, class, score) order, so the first claim on a
            # box after a stable sort by box is the highest-scored one: the TP.
            boxes = best_gt[candidates]
            by_box = np.argsort(boxes, kind="stable")
            first_claim = np.r_[True, boxes[by_box][1:] != boxes[by_box][:-1]]
            winners = candidates[by_box[first_claim]]
            tp[c, winners] = True
            matched[c, winners] = best_gt[winners]
            difficult_hits = np.flatnonzero(reaches & box_ignored)
            matched[c, difficult_hits] = best_gt[difficult_hits]
    return matched, tp, ignored
