"""Numbers at a chosen score cut: precision/recall/F1, best F1, log-average miss rate."""

import math

import numpy as np

from .curves import Curves, _relative, detection_weights
from .records import run_starts

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
    higher threshold (fewer detections) wins. Cuts lie at finite scores only. Returns
    None without positives or detections (or without a finite score).

    Examples
    --------
    >>> import numpy as np
    >>> best_f1(np.array([1., 1, 2]), np.array([0., 1, 1]), np.array([.9, .8, .7]), 2)["threshold"]
    0.7
    """
    if not n_pos or not len(scores):
        return None
    last_of_run = np.flatnonzero(np.r_[scores[1:] != scores[:-1], True])
    # A cut is a finite score: NaN scores (ranked last, as pycocotools ranks them)
    # pass no threshold, and an infinite one would not be a number in JSON.
    last_of_run = last_of_run[np.isfinite(scores[last_of_run])]
    if not len(last_of_run):
        return None
    f1 = 2.0 * tp[last_of_run] / (tp[last_of_run] + fp[last_of_run] + n_pos)
    best = last_of_run[int(np.argmax(f1))]
    tp_b, fp_b = float(tp[best]), float(fp[best])
    return {
        "threshold": float(scores[best]),
        "f1": _f1(tp_b, fp_b, n_pos),
        "precision": tp_b / (tp_b + fp_b) if tp_b + fp_b else 0.0,
        "recall": tp_b / n_pos,
    }


def every_point_counts(records, *, max_detections=None, weights=None, area=0, slot=0):
    """Running TP / FP sums at every detection in the pedestrian toolbox's order
    (``toolbox_order``), as the duplicated split would have them: the miss-rate curve.

    Unlike ``curves.cumulative_counts`` (one entry per detection, weighted), an image
    of weight w contributes the w copies of each of its runs of tied detections in the
    order the duplicated split accumulates them (copies with adjacent ids, so copy c's
    run of one class, image and score precedes copy c + 1's), so a reading at every
    point equals the duplicated split's.

    Returns ``curves.Curves`` over the expanded points.
    """
    w = detection_weights(records, max_detections, weights)
    order = toolbox_order(records)
    keep = np.flatnonzero(w > 0) if order is None else order[w[order] > 0]
    if weights is None or not np.any(w > 1):
        index = keep
    else:
        runs = np.cumsum(
            run_starts(records.det_class[keep], records.order_key()[keep], records.det_image[keep])
        )
        index = _duplicated_order(keep, runs, w)
    is_tp, is_ignored = records.outcomes(area, slot)
    is_fp = ~(is_tp | is_ignored)
    bounds = np.searchsorted(records.det_class[index], np.arange(len(records.classes) + 1))
    return Curves(
        tp=_relative(np.cumsum(is_tp[index]), bounds).astype(np.float64),
        fp=_relative(np.cumsum(is_fp[index]), bounds).astype(np.float64),
        bounds=bounds,
        n_pos=records.n_positives(area, weights),
        score=records.det_score[index],
    )


def toolbox_order(records):
    """Detection indices in the order the pedestrian toolbox reads them (Dollár et al.,
    ``bbGt`` ``compRoc``: every image's detections concatenated in image order —
    ``dt=cat(1,dt{:})``, each image's sorted by score, stably — then a stable
    ``sort(score,'descend')``): per class, score descending, then image, then file
    position. That is accumulation order under ``tie_order="image"`` (None is
    returned); under ``"file"`` (the VOC devkit's stable sort of the whole file) each
    run of tied scores is re-ordered by image, keeping file order within an image, so
    the miss rate never depends on how records of different images are interleaved."""
    n = records.n_detections
    if records.tie_order != "file" or n < 2:
        return None
    run = np.cumsum(run_starts(records.det_class, records.order_key()))
    return np.lexsort((np.arange(n), records.det_image, run))


def _duplicated_order(keep, label, w):
    """Detection indices in duplicated accumulation order: each run of tied detections
    (of one image; ``label`` marks the runs along ``keep``) repeated w times as a
    whole, copy after copy."""
    first = np.flatnonzero(np.r_[True, label[1:] != label[:-1]]) if len(keep) else keep
    length = np.diff(np.r_[first, len(keep)])
    copies = w[keep[first]]
    size = copies * length
    group = np.repeat(np.arange(len(first)), size)
    local = np.arange(int(size.sum())) - np.repeat(np.cumsum(size) - size, size)
    return keep[first[group] + local % length[group]]


def matlab_descending(score):
    """Indices of ``score`` in the order MATLAB's ``sort(score, 'descend')`` gives:
    stable, NaN first (MATLAB places NaN first in a descending sort: the 'auto' missing
    placement of its ``sort`` documentation, from memory). The pedestrian toolbox
    sorts with it (``bbGt`` ``evalRes``, ``compRoc``); numpy's argsort puts NaN last."""
    score = np.asarray(score)
    nan = np.isnan(score)
    rest = np.flatnonzero(~nan)
    return np.r_[np.flatnonzero(nan), rest[np.argsort(-score[rest], kind="stable")]]


def toolbox_running_counts(tp, fp, score):
    """Cumulative ``tp``/``fp`` (in accumulation order, scores descending, NaN last)
    re-read in ``compRoc``'s order, which moves NaN-scored detections first; the same
    arrays when no score is NaN."""
    nan = np.isnan(score)
    if not nan.any():
        return tp, fp
    order = np.r_[np.flatnonzero(nan), np.flatnonzero(~nan)]
    step_tp, step_fp = np.diff(np.r_[0, tp])[order], np.diff(np.r_[0, fp])[order]
    return np.cumsum(step_tp), np.cumsum(step_fp)


def log_average_miss_rate(tp, fp, n_pos, n_images):
    r"""Log-average miss rate over FPPI 10^-2 ... 10^0 (Dollár et al., TPAMI 2012).

    .. math:: \mathrm{LAMR} = \exp\Big(\frac{1}{9} \sum_{k=0}^{8}
              \ln \max(1 - R(f_k), 10^{-10})\Big), \quad f_k = 10^{-2 + k/4}

    As the pedestrian toolbox computes it (``bbGt`` ``compRoc``, ``dbEval``): the
    curve has a point after *every* detection in accumulation order (stable; ties are
    not merged), FPPI = FP / images, R = TP / n_pos, plus a starting point
    (-inf, 0); R(f) is the recall of the last point with FPPI <= f, so a budget no
    point meets gives miss rate 1. Ignored detections repeat the previous point and
    change nothing. Lower is better; None without positives or images.

    Examples
    --------
    One box, a TP and an FP tied at 0.9, in that order: recall 1 at FPPI 0, so the
    miss rate is 0 at every reference point, clamped to 1e-10.

    >>> import numpy as np
    >>> round(log_average_miss_rate(np.array([1., 1]), np.array([0., 1]), 1, 1), 20)
    1e-10
    """
    if not n_pos or not n_images:
        return None
    fppi = np.r_[-np.inf, np.asarray(fp, np.float64) / n_images]
    recall = np.r_[0.0, np.asarray(tp, np.float64) / n_pos]
    last = np.searchsorted(fppi, FPPI_POINTS, side="right") - 1
    miss = np.maximum(1.0 - recall[last], 1e-10)
    return float(math.exp(np.mean(np.log(miss))))
