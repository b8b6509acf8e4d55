"""The two published matching rules on candidate (detection, box) pairs, for
``matching.match``; each gives sparse matches ``(config, detection, box, iou)``.

* ``greedy`` (pycocotools ``COCOeval.evaluateImg``): per image and class, detections
  in descending score order (stable) each take the still-unmatched ground truth of
  highest IoU >= t; a regular box beats an ignored one, on equal IoU the later box in
  file order wins; a crowd region absorbs any number of detections. Groups where no
  detection has two candidate boxes are settled at once (``_first_claims``), the
  others walked rank by rank, every group at once at each rank (``_walk_ranks``).
* ``best_overlap`` (PASCAL VOC devkit ``VOCevaldet.m``): each detection looks only at
  the single box of highest overlap (first maximum wins); if that overlap >= t the
  detection is a TP when the box is free, a duplicate FP when taken, and ignored when
  the box is difficult. There is no fallback to a second-best box.

``concat`` stacks the per-step matches of either (and of ``sequential_walk``).
"""

import numpy as np

from .accumulation_order import run_starts

_REGULAR = np.int32(1) << 24  # added to the key of a regular (non-ignored) box


def greedy(
    pair_det,
    pair_gt,
    pair_iou_,
    rank,
    det_group,
    det_cls,
    effective,
    gt_ignored,
    crowd,
    *,
    by_rank=False,
):
    """Sparse matches ``(config, detection, box, iou)``; config = area * slots + slot.

    A group (image, class) in which no detection has two candidate boxes needs no
    walk: each box goes to its highest-ranked claimant at or above the threshold
    (every claimant, for a crowd region), the same in every size bucket. Only the
    other groups are walked rank by rank.
    """
    n_areas = len(gt_ignored)
    candidates = np.bincount(pair_det, minlength=len(det_group))
    crowded = np.unique(det_group[pair_det[candidates[pair_det] > 1]])
    walk = np.isin(det_group[pair_det], crowded, assume_unique=False)
    first = pair_det[~walk]
    found = _first_claims(
        first,
        pair_gt[~walk],
        pair_iou_[~walk],
        det_cls,
        effective,
        crowd,
        n_areas,
        rank[first] if by_rank else None,
    )
    found += _walk_ranks(
        pair_det[walk],
        pair_gt[walk],
        pair_iou_[walk],
        rank,
        det_cls,
        effective,
        gt_ignored,
        crowd,
    )
    return found


def _first_claims(pair_det, pair_gt, pair_iou_, det_cls, effective, crowd, n_areas, rank=None):
    """``rank``: the pairs' detection ranks, where accumulation order within a group
    may not be rank order (``accumulation_order.orders``' ``exact``); None: it is."""
    n_slots = len(effective)
    # detections are in rank order within a group unless ranks are given
    by_box = np.lexsort((pair_det if rank is None else rank, pair_gt))
    pair_det, pair_gt, pair_iou_ = pair_det[by_box], pair_gt[by_box], pair_iou_[by_box]
    found = []
    for t in range(n_slots):
        reaches = np.flatnonzero(pair_iou_ >= effective[t, det_cls[pair_det]])
        ordered = pair_gt[reaches]
        first = run_starts(ordered) | crowd[ordered]
        take = reaches[first]
        for a in range(n_areas):
            found.append(
                (
                    np.full(len(take), a * n_slots + t),
                    pair_det[take],
                    pair_gt[take],
                    pair_iou_[take],
                )
            )
    return found


def _walk_ranks(pair_det, pair_gt, pair_iou_, rank, det_cls, effective, gt_ignored, crowd):
    n_slots, n_areas = len(effective), len(gt_ignored)
    n_configs = n_slots * n_areas
    if not len(pair_det):
        return []
    taken = np.zeros((n_configs, gt_ignored.shape[1]), bool)
    regular = np.repeat(~gt_ignored, n_slots, axis=0)

    # Within each detection: ascending IoU, then file order, so the *last* maximum
    # (the reference's tie rule) has the highest static rank.
    by_det = np.lexsort((pair_gt, pair_iou_, pair_det))
    pair_det, pair_gt, pair_iou_ = pair_det[by_det], pair_gt[by_det], pair_iou_[by_det]
    first_pair = np.searchsorted(pair_det, pair_det, "left")
    static_rank = (np.arange(len(pair_det)) - first_pair + 1).astype(np.int32)
    by_rank = np.argsort(rank[pair_det], kind="stable")
    pair_det, pair_gt, pair_iou_, static_rank = (
        a[by_rank] for a in (pair_det, pair_gt, pair_iou_, static_rank)
    )
    pair_rank = rank[pair_det]
    bounds = np.flatnonzero(np.r_[True, pair_rank[1:] != pair_rank[:-1], True])
    found = []
    for b0, b1 in zip(bounds[:-1], bounds[1:]):
        d, g = pair_det[b0:b1], pair_gt[b0:b1]
        starts = np.flatnonzero(run_starts(d))
        reaches = pair_iou_[b0:b1] >= effective[:, det_cls[d]]  # (slots, pairs)
        eligible = (~taken[:, g] | crowd[g]).reshape(n_areas, n_slots, -1) & reaches
        key = np.where(regular[:, g], _REGULAR, 0) + static_rank[b0:b1]
        key = np.where(eligible.reshape(n_configs, -1), key, 0)
        best = np.maximum.reduceat(key, starts, axis=1)
        config, det = np.nonzero(best)
        chosen = starts[det] + (best[config, det] % _REGULAR) - 1
        box = g[chosen]
        taken[config, box] = True
        found.append((config, d[starts[det]], box, pair_iou_[b0:b1][chosen]))
    return found


def concat(found):
    """Stack the per-step matches into (config, det, box) int32 and IoU arrays."""
    if not found:
        return (*(np.zeros(0, np.int32),) * 3, np.zeros(0))
    columns = [np.concatenate([f[i] for f in found]) for i in range(4)]
    return (*(c.astype(np.int32) for c in columns[:3]), columns[3])


def best_overlap(pair_det, pair_gt, pair_iou_, det_cls, effective, gt_ignored):
    """Sparse matches ``(config, detection, box)`` by the VOC devkit's rule."""
    n_slots, n_areas = len(effective), len(gt_ignored)
    # Highest overlap per detection; on ties the first box in file order (MATLAB max).
    by_det = np.lexsort((pair_gt, -pair_iou_, pair_det))
    pair_det, pair_gt, pair_iou_ = pair_det[by_det], pair_gt[by_det], pair_iou_[by_det]
    first = run_starts(pair_det)
    det, box, best_iou = pair_det[first], pair_gt[first], pair_iou_[first]
    found = []
    for t in range(n_slots):
        reaches = best_iou >= effective[t, det_cls[det]]
        d, g, iou = det[reaches], box[reaches], best_iou[reaches]
        for a in range(n_areas):
            ignored = gt_ignored[a, g]
            # Detections are in accumulation order; a stable sort by (box, rank)
            # puts each box's highest-scored claim first: that one is the TP, later
            # claims are duplicates (false positives, so not recorded as matches).
            claims = np.flatnonzero(~ignored)
            by_box = np.lexsort((d[claims], g[claims]))
            ordered = g[claims][by_box]
            first_claim = claims[by_box[run_starts(ordered)]]
            keep = np.r_[first_claim, np.flatnonzero(ignored)]
            found.append((np.full(len(keep), a * n_slots + t), d[keep], g[keep], iou[keep]))
    return concat(found)
