"""Intersection over union of aligned box pairs."""

import numpy as np


def _side(start, size):
    """The devkit's side ``x2 - x1`` of corners ``x2 = x1 + w``: ``w`` for a finite
    ``x1`` (kept as given, not re-rounded), NaN for a NaN or infinite one (inf - inf)."""
    return np.where(np.isfinite(start), size, np.nan)


def pair_iou(det_boxes, gt_boxes, gt_crowd, *, pixel_offset=0.0):
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
        # fmin/fmax: C99's (bbIou) and MATLAB's min/max (the devkit) return the other
        # operand when one is NaN; np.minimum would propagate the NaN.
        iw = np.fmin(dw + dx, gw + gx) - np.fmax(dx, gx)
        ih = np.fmin(dh + dy, gh + gy) - np.fmax(dy, gy)
        if pixel_offset:
            iw = iw + pixel_offset
            ih = ih + pixel_offset
            det_area = (_side(dx, dw) + pixel_offset) * (_side(dy, dh) + pixel_offset)
            gt_area = (_side(gx, gw) + pixel_offset) * (_side(gy, gh) + pixel_offset)
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
