"""Numbers at a chosen score cut: precision/recall/F1, best F1, log-average miss rate."""

import math

import numpy as np

#: Dollár et al. (TPAMI 34(4), 2012): nine FPPI reference points 10^-2 ... 10^0,
#: evenly spaced in log space.
FPPI_POINTS = 10.0 ** np.linspace(-2.0, 0.0, 9)


def _f1(tp, fp, n_pos):
    denominator = tp + fp + n_pos
    return 2.0 * tp / denominator if denominator else 0.0


def threshold_scores(tp, fp, scores, n_pos, threshold):
    r"""Precision, recall and F1 keeping detections with score >= ``threshold``.

    .. math:: P = \\frac{TP}{TP + FP}, \\quad R = \\frac{TP}{n_{pos}}, \\quad
              F_1 = \\frac{2\\,TP}{TP + FP + n_{pos}}

    (common practice). ``tp``, ``fp``: cumulative sums along ``scores`` (descending).
    Precision is None when nothing is kept; recall None when there are no positives.
    """
    tp_k, fp_k = counts_at(tp, fp, scores, threshold)
    return scores_from_counts(tp_k, fp_k, n_pos, threshold)


def counts_at(tp, fp, scores, threshold):
    """TP and FP counts of the detections scoring >= ``threshold``."""
    kept = int(np.searchsorted(-scores, -threshold, side="right"))
    return (float(tp[kept - 1]), float(fp[kept - 1])) if kept else (0.0, 0.0)


def scores_from_counts(tp, fp, n_pos, threshold):
    return {
        "threshold": float(threshold),
        "tp": tp,
        "fp": fp,
        "precision": tp / (tp + fp) if tp + fp else None,
        "recall": tp / n_pos if n_pos else None,
        "f1": _f1(tp, fp, n_pos) if n_pos else None,
    }


def best_f1(tp, fp, scores, n_pos):
    r"""The score cut of highest F1, searched only between distinct scores.

    .. math:: s^* = \arg\max_s \frac{2\,TP(s)}{TP(s) + FP(s) + n_{pos}}

    (common practice; F1 as the harmonic mean of precision and recall).

    A cut keeps every detection scoring at or above it, so tied detections are kept
    or dropped together. Raw precision is used, not the envelope. On equal F1 the
    higher threshold (fewer detections) wins. Returns None without positives or
    detections.

    Examples
    --------
    >>> import numpy as np
    >>> best_f1(np.array([1., 1, 2]), np.array([0., 1, 1]), np.array([.9, .8, .7]), 2)["threshold"]
    0.7
    """
    if not n_pos or not len(scores):
        return None
    last_of_run = np.flatnonzero(np.r_[scores[1:] != scores[:-1], True])
    f1 = 2.0 * tp[last_of_run] / (tp[last_of_run] + fp[last_of_run] + n_pos)
    best = last_of_run[int(np.argmax(f1))]
    tp_b, fp_b = float(tp[best]), float(fp[best])
    return {
        "threshold": float(scores[best]),
        "f1": _f1(tp_b, fp_b, n_pos),
        "precision": tp_b / (tp_b + fp_b) if tp_b + fp_b else 0.0,
        "recall": tp_b / n_pos,
    }


def log_average_miss_rate(tp, fp, scores, n_pos, n_images):
    r"""Log-average miss rate over FPPI 10^-2 ... 10^0 (Dollár et al., TPAMI 2012).

    .. math:: \mathrm{LAMR} = \exp\Big(\frac{1}{9} \sum_{k=0}^{8}
              \ln \max(\mathrm{MR}(f_k), 10^{-10})\Big), \quad f_k = 10^{-2 + k/4}

    The curve is traced by lowering the score threshold: one point per distinct
    score (tied detections enter together), FPPI = FP / images, MR = 1 - TP / n_pos.
    MR(f) is the miss rate of the last point with FPPI <= f (the lowest miss rate
    within that budget), 1 when none is. Lower is better; None without positives.

    Examples
    --------
    A perfect detector misses nothing at any budget:

    >>> import numpy as np
    >>> round(log_average_miss_rate(np.array([1., 2]), np.array([0., 0]),
    ...                             np.array([.9, .8]), 2, 10), 12)
    1e-10
    """
    if not n_pos or not n_images:
        return None
    if len(scores):
        cuts = np.flatnonzero(np.r_[scores[1:] != scores[:-1], True])
        fppi = fp[cuts] / n_images
        miss = 1.0 - tp[cuts] / n_pos
        last = np.searchsorted(fppi, FPPI_POINTS, side="right") - 1
        at_points = np.where(last >= 0, miss[np.maximum(last, 0)], 1.0)
    else:
        at_points = np.ones(len(FPPI_POINTS))
    return float(math.exp(np.mean(np.log(np.maximum(at_points, 1e-10)))))
