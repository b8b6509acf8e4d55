"""Box overlaps and per-image matching of the pedestrian setups (``pedestrian``): the
toolbox's ``bbGt.compOas`` / ``evalRes`` and ``bbApply resize`` (Dollár et al., TPAMI
34(4), 2012), and the city-scale script's ``iou`` / ``evaluateImg`` matching
(``eval_MR_multisetup.py``, Zhang et al., CVPR 2017), written from the published code's
logic; the rules in words are in ``pedestrian``'s docstring.
"""

import functools

import numpy as np

from .pedestrian_setups import MIN_OVERLAP


# Non-finite boxes (``[Infinity, 10, -Infinity, 30]``, Python's json reads them) give
# the IEEE results the toolbox's MATLAB doubles give (inf - inf = NaN, no error in
# MATLAB): computed quietly, as boxes.pair_iou does.
def _quiet(function):
    @functools.wraps(function)
    def quietly(*args, **kwargs):
        with np.errstate(over="ignore", under="ignore", divide="ignore", invalid="ignore"):
            return function(*args, **kwargs)

    return quietly


#: ``overlaps``' rules for a corner that is NaN: MATLAB's ``min``/``max`` (the toolbox)
#: omit it (MathWorks documentation), Python's builtin ``min(d, g)``/``max(d, g)`` (the
#: city-scale script's ``iou``) keep the first argument unless the second compares
#: less/greater, i.e. the detection's corner when either is NaN.
MATLAB, PYTHON = "matlab", "python"


@_quiet
def overlaps(det, gt, ignored, nan_rule=MATLAB):
    """``compOas``: (len(det), len(gt)) overlaps of xywh boxes, continuous coordinates;
    IoU for a regular box, intersection over the detection's area for an ignore box;
    0 where the boxes do not intersect. Per pair (toolbox ``bbGt.compOas``; the
    city-scale ``iou`` alike): ``w = min(dx2, gx2) - max(dx1, gx1)``, 0 if ``w <= 0``;
    ``h`` likewise; ``t = w * h``; ``oa = t / (da if ignored else da + ga - t)``. A NaN
    ``w`` or ``h`` is not ``<= 0``, so the pair's overlap is then computed (NaN);
    ``nan_rule`` says how ``min``/``max`` treat a NaN corner (``MATLAB``, ``PYTHON``)."""
    if nan_rule == MATLAB:
        low, high = np.fmax, np.fmin
    else:

        def low(d, g):
            return np.where(g > d, g, d)

        def high(d, g):
            return np.where(g < d, g, d)

    x1 = low(det[:, None, 0], gt[None, :, 0])
    y1 = low(det[:, None, 1], gt[None, :, 1])
    w = high(det[:, None, 0] + det[:, None, 2], gt[None, :, 0] + gt[None, :, 2]) - x1
    h = high(det[:, None, 1] + det[:, None, 3], gt[None, :, 1] + gt[None, :, 3]) - y1
    empty = (w <= 0) | (h <= 0)
    inter = w * h
    det_area = (det[:, 2] * det[:, 3])[:, None]
    union = det_area + (gt[:, 2] * gt[:, 3])[None, :] - inter
    denominator = np.where(ignored[None, :], det_area, union)
    out = np.zeros(inter.shape)
    np.divide(inter, denominator, out=out, where=~empty)
    return out


def match_image(oa, ignored, void=None, taken=None):
    """``evalRes`` for one image: ``oa`` rows are detections by score descending,
    columns boxes; ``ignored`` per box. Returns per detection 1 (true positive), -1
    (ignored) or 0 (false positive). ``void`` (the city-scale code): per box, whether a
    match with it is a false positive although the box is taken — its annotation id is
    0, and ``evaluateImg`` stores the matched box's id in ``dtMatches``, which
    ``accumulate`` reads as matched only when nonzero. ``taken``: a list given to
    receive each matched box (regular or ignore), in match order."""
    order = [g for g in range(len(ignored)) if not ignored[g]]
    order += [g for g in range(len(ignored)) if ignored[g]]
    matched = [False] * len(ignored)
    out = []
    for row in oa:
        best, best_g, best_m = MIN_OVERLAP, -1, 0
        for g in order:
            if matched[g]:
                continue
            if best_m != 0 and ignored[g]:
                break
            if row[g] < best:
                continue
            best, best_g, best_m = row[g], g, (-1 if ignored[g] else 1)
        if best_m != 0 and taken is not None:
            taken.append(best_g)
        if best_m == 1:
            matched[best_g] = True
            if void is not None and void[best_g]:
                best_m = 0
        out.append(best_m)
    return out


@_quiet
def standardise_aspect(boxes, ar):
    """``bbApply resize(bb, 1, 0, ar)``: width set to ``ar * h`` about the centre,
    height kept, in the toolbox's arithmetic: ``d = h*ar - w; x -= d/2; w += d``."""
    out = np.array(boxes, np.float64, copy=True)
    d = out[:, 3] * ar - out[:, 2]
    out[:, 0] = out[:, 0] - d / 2
    out[:, 2] = out[:, 2] + d
    return out
