"""Miss rate against false positives per image (``pedestrian``): the reading of the
nine reference FPPI points and the log-average miss rate (toolbox ``dbEval`` and
``bbGt.compRoc``, Dollár et al., TPAMI 34(4), 2012; the city-scale script's
``accumulate`` / ``summarize``, Zhang et al., CVPR 2017), and the curve drawn for a chart.
"""

import math

import numpy as np

from .pedestrian_setups import CLAMP, CURVE_POINTS


def read_references(tp, fp, n_pos, n_images, protocol):
    """Recall at each reference FPPI from running TP/FP counts (ignored detections
    already dropped), by the variant's rule; then the miss rates and their LAMR.

    .. math:: \\mathrm{LAMR} = \\exp\\Big(\\frac{1}{9}\\sum_k \\ln \\max(1 - R(f_k),
              10^{-10})\\Big)

    (``dbEval``; the city-scale code takes no max). Returns ``(miss_rates, lamr)``.
    """
    refs = np.asarray(protocol.fppi_points)
    fppi = np.asarray(fp, np.float64) / n_images
    recall = np.asarray(tp, np.float64) / n_pos
    if protocol.variant == "toolbox":
        fppi, recall = np.r_[-np.inf, fppi], np.r_[0.0, recall]
        reached = recall[np.searchsorted(fppi, refs, side="right") - 1]
        miss = 1.0 - reached
        return miss, float(math.exp(np.mean(np.log(np.maximum(miss, CLAMP)))))
    if len(recall) == 0:
        reached = np.zeros(len(refs))
    else:
        reached = recall[np.searchsorted(fppi, refs, side="right") - 1]  # -1 → last
    miss = 1.0 - reached
    if np.any(miss <= 0):
        return miss, 0.0
    return miss, float(np.exp(np.mean(np.log(miss))))  # summarize's np.exp, to the bit


def curve_points(tp, fp, n_pos, n_images, limit=CURVE_POINTS):
    """The miss-rate-versus-FPPI staircase for a chart: for each distinct FPPI the
    lowest miss rate reached at it, thinned to at most ``limit`` points spread evenly
    in log FPPI (the first and last kept)."""
    if len(tp) == 0:
        return {"fppi": [], "miss_rate": []}
    fppi = np.asarray(fp, np.float64) / n_images
    miss = 1.0 - np.asarray(tp, np.float64) / n_pos
    last = np.flatnonzero(np.r_[fppi[1:] != fppi[:-1], True])
    fppi, miss = fppi[last], miss[last]
    if len(fppi) > limit:
        positive = fppi > 0
        first = int(np.argmax(positive)) if positive.any() else len(fppi) - 1
        grid = np.geomspace(fppi[first], fppi[-1], limit - 1)
        pick = np.unique(np.r_[0, np.searchsorted(fppi, grid, side="right") - 1, len(fppi) - 1])
        fppi, miss = fppi[pick], miss[pick]
    return {"fppi": fppi.tolist(), "miss_rate": miss.tolist()}
