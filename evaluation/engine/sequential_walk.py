"""pycocotools 2.0.11 ``COCOeval.evaluateImg``'s matching loop written out, for the
(image, class) groups no vectorised rule of ``matching`` reproduces, and the refusal
that loop's id write can raise.

``walk_sequentially`` walks, detection by detection and box by box, the groups where
some IoU is NaN (``ious[d, g] < iou`` is false once ``iou`` is NaN, so the next eligible
box takes over) or where a detection's id leaves the box it matches free (read "as
given", ``loaders.as_given``: ``gtm[t, m] = d['id']`` not above 0, so ``gtm > 0`` does
not skip the box). ``refuse_unwritable_ids`` refuses a file where a box or a detection
whose id numpy cannot write into the float ``dtm``/``gtm`` takes part in a match, as
``evaluateImg`` raises there. Both are rare; ``matching.match`` calls them for those groups only.
"""

import numpy as np

from .boxes import pair_iou
from .errors import InputError


def refuse_box_id(truth, fault, raises_there):
    """Refuse a box whose id (``GroundTruth.cityscale_faults["id"]`` entry ``fault``)
    a detection matches: the reference writes it into a float array and raises."""
    _, record, shown, _ = fault
    raise InputError(
        truth.source,
        f"the annotation's id {shown} is matched by a detection, and numpy cannot "
        "write it into a float array (text that is no number, an integer beyond "
        f"float64): {raises_there}",
        record=record,
        field="id",
    )


def refuse_unwritable_ids(truth, predictions, order, matched, boxes):
    """pycocotools 2.0.11 ``evaluateImg`` writes, for each match (any size range, any
    IoU, a crowd or out-of-range box too), the box's id into the float ``dtm`` and then
    the detection's id into the float ``gtm`` (``dtm[tind, dind] = gt[m]['id']``;
    ``gtm[tind, m] = d['id']``): an id numpy cannot write (text Python's ``float`` does
    not read, such as ``"x"``) raises there. So a file where such a box (the loader's
    ``GroundTruth.cityscale_faults["id"]``: ``annotation_flags.unwritable_id``) or such a
    detection (``Predictions.unwritable``) takes part in a match is refused, naming
    its record; the box first, as its write comes first. ``matched``/``boxes``: the
    match rows' detections (in ``order``) and boxes."""
    faults = {entry[0]: entry for entry in truth.cityscale_faults.get("id", ())}
    hit = sorted(set(faults) & set(np.unique(boxes).tolist())) if faults else ()
    if hit:
        refuse_box_id(
            truth,
            faults[hit[0]],
            "pycocotools 2.0.11 raises there (evaluateImg: dtm[tind, dind] = "
            "gt[m]['id'], ValueError)",
        )
    if predictions.unwritable is None:
        return
    record = predictions.unwritable[order[matched]]
    record = record[record >= 0]
    if len(record):
        raise InputError(
            predictions.source,
            "a detection read as given whose id numpy cannot write into a float array "
            "(text that is no number) matches a box: pycocotools 2.0.11 raises there "
            "(evaluateImg: gtm[t, m] = d['id'], ValueError)",
            record=f"record {int(record.min())}",
            field="id",
        )


def walk_sequentially(
    groups,
    det_group,
    det_boxes,
    rank,
    det_cls,
    truth,
    protocol,
    effective,
    gt_ignored,
    free=None,
    left_out=None,
):
    """Matches in the (image, class) groups where some IoU is NaN, or some detection's
    id leaves the box it matches free (``free``: ``gtm[t, m] = d['id']`` is not above
    0, so ``gtm > 0`` does not skip the box), by the loop of pycocotools 2.0.11
    ``COCOeval.evaluateImg`` written out.

    There a detection keeps the candidate ``m`` unless ``ious[d, g] < iou``; once
    ``iou`` is NaN that comparison is false for every later box, so the next eligible
    box (even one of IoU 0) takes over, and a NaN IoU can win. No vectorised rule
    reproduces that, so these (rare) groups are walked here: boxes ordered regular
    before ignored (stable), detections by rank, a crowd box reusable, the scan
    stopping at the first ignored box once a regular one is held.
    """
    found = []
    if not len(groups):
        return found
    n_slots, n_areas = len(effective), len(gt_ignored)
    n_classes = len(truth.classes)
    gt_group = truth.box_image.astype(np.int64) * n_classes + truth.box_class
    if left_out is not None:  # boxes the reading leaves out (``matching._reading``)
        gt_group[left_out] = -1
    for group in groups.tolist():
        dets = np.flatnonzero(det_group == group)
        dets = dets[np.argsort(rank[dets], kind="stable")]
        boxes = np.flatnonzero(gt_group == group)
        cls = int(det_cls[dets[0]])
        for a in range(n_areas):
            order = boxes[np.argsort(gt_ignored[a, boxes], kind="stable")]
            ignored = gt_ignored[a, order].tolist()
            crowd = truth.crowd[order].tolist()
            ious = pair_iou(
                np.repeat(det_boxes[dets], len(order), axis=0),
                np.tile(truth.boxes[order], (len(dets), 1)),
                np.tile(truth.crowd[order], len(dets)),
                pixel_offset=protocol.pixel_offset,
            ).reshape(len(dets), len(order))
            for t in range(n_slots):
                taken = [False] * len(order)
                for dind, d in enumerate(dets.tolist()):
                    iou, m = float(effective[t, cls]), -1
                    for gind, value in enumerate(ious[dind].tolist()):
                        if taken[gind] and not crowd[gind]:
                            continue
                        if m > -1 and not ignored[m] and ignored[gind]:
                            break
                        if value < iou:
                            continue
                        iou, m = value, gind
                    if m == -1:
                        continue
                    taken[m] = taken[m] or free is None or not free[d]
                    found.append(
                        (
                            np.array([a * n_slots + t]),
                            np.array([d]),
                            np.array([order[m]]),
                            np.array([ious[dind, m]]),
                        )
                    )
    return found
