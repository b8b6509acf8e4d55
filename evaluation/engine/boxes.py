"""Intersection over union of aligned box pairs."""

import numpy as np


def from_corners(corners):
    """xywh rows ``[x1, y1, x2 - x1, y2 - y1]`` of (n, 4) corners, as the loaders store
    boxes (the corners themselves kept where they say more: ``said_corners``)."""
    corners = np.asarray(corners, np.float64).reshape(-1, 4)
    with np.errstate(invalid="ignore", over="ignore"):
        return np.column_stack([corners[:, :2], corners[:, 2:] - corners[:, :2]])


def said_corners(boxes, corners):
    """``corners`` ((n, 4) ``x1, y1, x2, y2`` as read) where one says more than its
    xywh row ``boxes`` (``x1 + w != x2`` or ``y1 + h != y2``, NaN equal to NaN), else
    None: what ``GroundTruth.corners`` / ``Predictions.corners`` keep. ``w = x2 - x1``
    rounds, so ``x1 + w`` can miss ``x2`` by an ulp (17.8 + (50.6 - 17.8) is
    50.599999999999994); a file whose every edge rebuilds exactly carries nothing."""
    if corners is None or not len(corners):
        return None
    with np.errstate(invalid="ignore", over="ignore"):
        rebuilt = boxes[:, :2] + boxes[:, 2:]
    same = np.array_equal(rebuilt, corners[:, 2:], equal_nan=True)
    return None if same else np.ascontiguousarray(corners, np.float64)


def edges(boxes, corners=None):
    """(n, 4) ``x1, y1, x2, y2`` of xywh ``boxes``: the right and bottom edges from
    ``corners`` (as read) where given, else ``x + w`` and ``y + h`` (as a converter
    writing xywh would have them)."""
    if corners is not None:
        return corners
    with np.errstate(invalid="ignore", over="ignore"):
        return np.column_stack([boxes[:, :2], boxes[:, :2] + boxes[:, 2:]])


def _side(start, size):
    """The devkit's side ``x2 - x1`` of corners ``x2 = x1 + w``: ``w`` for a finite
    ``x1`` (kept as given, not re-rounded), NaN for a NaN or infinite one (inf - inf)."""
    return np.where(np.isfinite(start), size, np.nan)


def _far_edges(boxes, corners):
    """``(x2, y2, side x, side y)`` of one side's boxes: from its corners as read
    (``x2 - x1``, the devkit's arithmetic on them), else ``x + w`` and ``_side``."""
    x, y, w, h = boxes.T
    if corners is None:
        return w + x, h + y, _side(x, w), _side(y, h)
    x1, y1, x2, y2 = corners.T
    return x2, y2, x2 - x1, y2 - y1


def pair_iou(det_boxes, gt_boxes, gt_crowd, *, pixel_offset=0.0, det_corners=None, gt_corners=None):
    r"""IoU of each detection with the ground-truth box in the same row.

    .. math:: \mathrm{IoU} = \frac{|D \cap G|}{|D| + |G| - |D \cap G|}

    with widths of the intersection ``min(x1 + w1, x2 + w2) - max(x1, x2) + o`` (zero
    when not positive) and areas ``(w + o)(h + o)``, where ``o`` is the pixel offset:
    0 for continuous coordinates (COCO), 1 for inclusive pixel indices (PASCAL VOC
    devkit ``VOCevaldet.m``). For a crowd ground truth the union is the detection's
    own area, so a detection inside a crowd region scores 1 (pycocotools ``maskApi.c``
    ``bbIou``). The operation order follows ``bbIou`` so results agree bit for bit.
    A box of negative width or height overlaps nothing at offset 0: the intersection
    width is at most the smaller of the two widths (``bbIou`` skips ``w <= 0``).
    Non-finite coordinates follow the same C arithmetic: ``fmin``/``fmax`` ignore a
    NaN operand, a NaN intersection side is not skipped at offset 0 (it is in the
    devkit's ``iw>0 & ih>0``), so the IoU may be NaN, inf or beyond 1.

    ``det_corners``, ``gt_corners``: (n, 4) ``x1, y1, x2, y2`` as a corner file gives
    them (``GroundTruth.corners``), for the references that read corners (the VOC
    devkit, KITTI): a side's right and bottom edges are then its ``x2``, ``y2``, not
    ``x + w`` (which can miss ``x2`` by an ulp), and its lengths ``x2 - x1``.

    Parameters
    ----------
    det_boxes, gt_boxes : ndarray of shape (n, 4)
        ``[x, y, w, h]`` rows, float64.
    gt_crowd : ndarray of bool, shape (n,)
    pixel_offset : float, keyword-only

    Returns
    -------
    ndarray of shape (n,), float64 (in [0, 1] for finite boxes of non-negative size).

    Examples
    --------
    >>> import numpy as np
    >>> pair_iou(np.array([[0., 0, 10, 10]]), np.array([[5., 0, 10, 10]]), np.array([False]))
    array([0.33333333])
    """
    dx, dy, dw, dh = det_boxes.T
    gx, gy, gw, gh = gt_boxes.T
    # Overflow gives inf, as in the reference's C doubles (IoU 0 then); no warning.
    with np.errstate(over="ignore", under="ignore", divide="ignore", invalid="ignore"):
        dx2, dy2, dsx, dsy = _far_edges(det_boxes, det_corners)
        gx2, gy2, gsx, gsy = _far_edges(gt_boxes, gt_corners)
        # fmin/fmax: C99's (bbIou) and MATLAB's min/max (the devkit) return the other
        # operand when one is NaN; np.minimum would propagate the NaN.
        iw = np.fmin(dx2, gx2) - np.fmax(dx, gx)
        ih = np.fmin(dy2, gy2) - np.fmax(dy, gy)
        if pixel_offset:
            iw = iw + pixel_offset
            ih = ih + pixel_offset
            det_area = (dsx + pixel_offset) * (dsy + pixel_offset)
            gt_area = (gsx + pixel_offset) * (gsy + pixel_offset)
        else:
            det_area = dw * dh
            gt_area = gw * gh
        if pixel_offset:  # the devkit: "if iw>0 & ih>0" (false for NaN)
            overlap = (iw > 0) & (ih > 0)
        else:  # bbIou skips a pair on "w<=0" / "h<=0" only (false for NaN)
            overlap = ~(iw <= 0) & ~(ih <= 0)
        # Only overlapping pairs multiply: two far-apart (or negative-size) boxes can
        # have both gaps huge, and their product would overflow for nothing.
        inter = np.where(overlap, iw, 0.0) * np.where(overlap, ih, 0.0)
        union = np.where(gt_crowd, det_area, det_area + gt_area - inter)
        iou = np.where(overlap, inter / union, 0.0)
    return iou
