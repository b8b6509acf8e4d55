"""Average precision read off the true-positive points of ``curves``: final recall,
the precision envelope, interpolated precision at recall points (with pycocotools'
stopped fill) and the all-point area under the envelope.
"""

import numpy as np

from .curves import TruePositivePoints  # noqa: F401 (interpolated_precision's doctest)


def recall_score(points):
    """Final recall TP / n_pos per slot and class; NaN for a class with no positives.

    pycocotools reports ``rc[-1]`` (0 without detections): the same number, as TP
    sums are exact integers.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        recall = points.totals / points.n_pos
    recall[:, points.n_pos == 0] = np.nan
    return recall


def recall_point_mean(precision, axis=1, running=False):
    r"""AP from precision sampled at :math:`n` recall points (``axis``).

    .. math:: AP = \frac{1}{n} \sum_{r} \hat p(r)

    Summed as each reference sums it: numpy's ``mean`` (pycocotools'
    ``np.mean(s[s > -1])``, pairwise summation), or, ``running``, the VOC 2007 devkit's
    ``ap=ap+p/11`` in recall order (``VOCevaldet.m``; from memory, and as its Python
    ports write it): each point's share added in turn, so AP equals the devkit's bit
    for bit (a perfect class is 1.0000000000000002 there, and here).
    """
    if not running:
        return precision.mean(axis=axis)
    points = np.moveaxis(np.asarray(precision, np.float64), axis, 0)
    n = points.shape[0]
    total = np.zeros(points.shape[1:])
    for p in points:
        total = total + p / n
    return total


def envelope(precision):
    r"""Running maximum from the right: the monotone precision envelope.

    .. math:: \hat p_i = \max_{j \ge i} p_j
    """
    return np.maximum.accumulate(precision[::-1])[::-1]


def first_points(n_pos, recall_points):
    r"""Index of the first point reaching each recall point, per row of ``n_pos``:
    shape (rows, recall points), and which rows have positives.

    TP counts along a run are 1, 2, 3, ... (each point is one true positive), so the
    first point with recall >= r is number :math:`c_r`, the least integer with
    :math:`c / n_{pos} \ge r` in floating point, exactly as a search over the recall
    array finds it (pycocotools' ``np.searchsorted(rc, recThrs, side='left')``).
    """
    present = n_pos > 0
    safe = np.where(present, n_pos, 1.0)[:, None]
    with np.errstate(invalid="ignore"):
        c = np.ceil(recall_points[None, :] * safe)
        for _ in range(2):
            c = np.where((c >= 1) & ((c - 1) / safe >= recall_points), c - 1, c)
            c = np.where(c / safe < recall_points, c + 1, c)
    return np.maximum(c - 1, 0).astype(np.int64), present


def interpolated_precision(points, recall_points, *, epsilon=0.0, slots=None):
    r"""Envelope precision at each recall point, shape (slots, points, classes).

    .. math:: p_{\mathrm{interp}}(r) = \max_{i : R_i \ge r} P_i, \quad
              P_i = \frac{TP_i}{TP_i + FP_i + \varepsilon}, \quad R_i = \frac{TP_i}{n_{pos}}

    0 when no point reaches r; NaN for a class without positives (absent), and, with
    ``epsilon`` 0 and a recall point <= 0, for a class whose detections are all
    ignored (``curves.TruePositivePoints.uncounted``: P is 0/0 at each, and the VOC
    2007 devkit's ``max`` of NaN alone is NaN); ``slots`` restricts the output to those
    IoU slots. With
    ``epsilon`` = float64 machine epsilon and the 101 points of ``linspace(0, 1, 101)``
    this is pycocotools' ``precision`` array; the 11 points of
    ``protocols.VOC07_RECALL_POINTS`` give VOC 2007 (Everingham et al., IJCV 2010),
    40 points k/40 give Simonelli et al. (ICCV 2019).

    Examples
    --------
    One correct detection, one positive: precision 1 up to recall 1.

    >>> import numpy as np
    >>> p = TruePositivePoints(np.array([1.]), np.array([0.]), np.array([0, 1]),
    ...                        np.array([1.]), np.array([[1.]]))
    >>> interpolated_precision(p, [0.0, 0.5, 1.0])[0, :, 0].tolist()
    [1.0, 1.0, 1.0]
    """
    recall_points = np.asarray(recall_points, dtype=np.float64)
    n_classes = len(points.n_pos)
    slots = list(range(points.n_slots)) if slots is None else list(slots)
    n_pos = points.n_pos
    first, present = first_points(n_pos, recall_points)  # (classes, points)

    runs = points.runs[:-1].reshape(points.n_slots, n_classes)[slots]
    lengths = np.diff(points.runs).reshape(points.n_slots, n_classes)[slots]
    reached = first[None] < lengths[..., None]  # (slots, classes, points)
    block = runs[..., None] + np.minimum(first[None], lengths[..., None])
    bounds = np.concatenate([block, (runs + lengths)[..., None]], axis=2)
    # Envelope at each first point: maxima over the blocks between consecutive first
    # points, then a running maximum from the last block back (suffix maximum).
    precision = np.r_[points.tp / (points.fp + points.tp + epsilon), 0.0]
    maxima = np.maximum.reduceat(precision, bounds.ravel()).reshape(bounds.shape)[..., :-1]
    maxima[bounds[..., 1:] <= bounds[..., :-1]] = 0.0
    env = np.maximum.accumulate(maxima[..., ::-1], axis=2)[..., ::-1]
    if points.stop is not None:  # integer scores beyond float64's range
        reached &= ~fill_stops(points, recall_points, first, runs, reached)
    out = np.where(reached, env, 0.0).transpose(0, 2, 1).copy()
    out[:, :, ~present] = np.nan
    if epsilon == 0 and points.uncounted is not None and (recall_points <= 0).any():
        # TP / (FP + TP) is 0/0 at each of the class's detections, and the VOC 2007
        # devkit's p = max(prec(rec >= 0)) of NaN alone is NaN: the class is undefined
        out = np.where(points.uncounted[slots][:, None, :] & present, np.nan, out)
    return out


def fill_stops(points, recall_points, first, runs, reached):
    """Where pycocotools 2.0.11's precision fill has stopped, shape (slots, classes,
    recall points): after the first recall point whose detection holds an integer
    score beyond float64's range (``points.stop``, ``points.head_stop``).

    Its ``accumulate`` fills ``q[ri] = pr[pi]; ss[ri] = dtScoresSorted[pi]`` for
    ``pi = np.searchsorted(rc, recThrs, side='left')`` inside ``try: ... except: pass``;
    writing such an integer into the float64 ``ss`` raises OverflowError, swallowed,
    so ``q[ri]`` is set and every later recall point keeps 0. ``pi`` is the first
    point reaching the recall (a true positive), except at recall 0 (and below):
    index 0, the class's first accumulated detection, whatever it is (``head_stop``).
    Recall (``rc[-1]``) is untouched. Verified on pycocotools 2.0.11 itself
    (``tests/engine/test_beyond_float64.py``).
    """
    at = runs[..., None] + first[None]  # (slots, classes, points)
    hit = np.zeros(reached.shape, bool)
    hit[reached] = points.stop[at[reached]]
    at_zero = np.asarray(recall_points) <= 0
    head = np.broadcast_to(points.head_stop[None, :, None], hit.shape)
    hit[..., at_zero] = head[..., at_zero]
    stopped = np.zeros(hit.shape, bool)
    stopped[..., 1:] = np.logical_or.accumulate(hit, axis=2)[..., :-1]
    return stopped


def all_point_average_precision(points):
    r"""Area under the precision envelope, shape (slots, classes) (VOC 2010+).

    .. math:: AP = \sum_i (r_i - r_{i-1})\, \hat p_i, \quad r_0 = 0

    over the points where recall changes, the envelope closed by (1, 0) (PASCAL VOC
    devkit ``VOCap.m``). Precision is TP / (TP + FP) without epsilon, as in the
    devkit. NaN for absent classes. The sum runs over the very terms ``VOCap.m`` sums,
    its closing ``(1 - r_n) * 0`` included where the final recall is below 1: numpy's
    pairwise ``np.sum`` groups 8 or more terms in partial sums, so one term more or
    less can move the last bit (red team audit14 F1: 7 true positives).
    """
    n_classes = len(points.n_pos)
    out = np.zeros((points.n_slots, n_classes))
    out[:, points.n_pos == 0] = np.nan
    for t in range(points.n_slots):
        for k in np.flatnonzero(points.n_pos > 0):
            tp, fp = points.run(t, k)
            if not len(tp):
                continue
            recall = tp / points.n_pos[k]
            env = envelope(tp / (fp + tp))
            terms = np.diff(np.r_[0.0, recall]) * env
            if recall[-1] != 1.0:  # VOCap's step from the final recall to (1, 0)
                terms = np.r_[terms, 0.0]
            out[t, k] = np.sum(terms)
    return out
