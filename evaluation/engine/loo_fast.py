r"""Leave-one-out interpolated AP of every image at once, exactly, without re-reading
the whole curve for each image.

Leaving image i out of a class's ranked detections removes its true-positive points and
shifts the counts of every later point by the image's own TPs and FPs ranked before it:

.. math:: tp'_j = tp_j - a_i(j), \quad fp'_j = fp_j - b_i(j), \quad
          P'_j = \frac{tp'_j}{fp'_j + tp'_j + \varepsilon}

The shift (a, b) is constant between two of the image's own detections, so the
remaining points fall into *segments* of constant shift. The envelope at a recall point
(the maximum of P' over the points from the first one reaching it) is the maximum over
the rest of its segment and the maxima of the later segments; each segment maximum is a
range-maximum query on the curve shifted by that segment's (a, b), answered in O(1)
from a sparse table per distinct shift (few: an image holds a handful of detections of a
class). Work: O(distinct shifts x points x log points + images x (recall points +
own detections)) instead of O(images x points). The values compared are computed with
the same floating-point operations as ``average_precision.interpolated_precision`` on the same
integer counts, so the result is the same to the bit.
"""

import numpy as np

from .average_precision import first_points


def _segments(image, tp, at, variants, n_images):
    """Constant-shift segments of every variant: (variant, start, end, a, b), sorted by
    variant then start, and the number of each variant's own TP points."""
    n_points = len(at)
    var_of = np.full(n_images, -1, np.int64)
    var_of[variants] = np.arange(len(variants))
    tp_var = var_of[image[at]]
    own = np.flatnonzero(tp_var >= 0)
    fp_seq = np.flatnonzero(~tp)
    fp_var = var_of[image[fp_seq]]
    sel = fp_var >= 0
    ev_var = np.concatenate([tp_var[own], fp_var[sel]])
    ev_pos = np.concatenate([own, np.searchsorted(at, fp_seq[sel])])
    ev_tp = np.concatenate([np.ones(len(own), bool), np.zeros(int(sel.sum()), bool)])
    order = np.lexsort((ev_tp, ev_pos, ev_var))  # an FP before a TP at one position
    ev_var, ev_pos, ev_tp = ev_var[order], ev_pos[order], ev_tp[order]
    v = len(variants)
    n_ev = np.bincount(ev_var, minlength=v)
    ev_start = np.cumsum(n_ev) - n_ev
    seg_var = np.repeat(np.arange(v), n_ev + 1)
    seg_rank = np.arange(len(seg_var)) - np.repeat(ev_start + np.arange(v), n_ev + 1)
    prev = ev_start[seg_var] + seg_rank - 1
    has_prev = seg_rank > 0
    safe_prev = np.where(has_prev, prev, 0)
    start = np.where(has_prev, ev_pos[safe_prev] + ev_tp[safe_prev], 0) if len(ev_pos) else 0
    nxt = ev_start[seg_var] + seg_rank
    has_next = seg_rank < n_ev[seg_var]
    end = (
        np.where(has_next, ev_pos[np.where(has_next, nxt, 0)], n_points)
        if len(ev_pos)
        else (np.full(len(seg_var), n_points))
    )
    start = np.broadcast_to(start, seg_var.shape)
    tp_before = np.r_[0, np.cumsum(ev_tp)]
    a = tp_before[ev_start[seg_var] + seg_rank] - tp_before[ev_start[seg_var]]
    b = seg_rank - a
    keep = start < end
    own_count = np.bincount(tp_var[own], minlength=v)
    return seg_var[keep], start[keep], end[keep], a[keep], b[keep], own_count


def _range_max(x, y, epsilon, shift_a, shift_b, combo, lo, hi):
    """max over j in [lo, hi] of (x_j - a) / ((y_j - b) + (x_j - a) + eps) for each
    query's shift (``shift_a[combo]``, ``shift_b[combo]``).

    One sparse table over the shifted curves laid end to end, each shift's curve only
    over the span its queries touch (queries never cross from one span to the next).
    """
    out = np.empty(len(lo))
    if not len(lo):
        return out
    n_combos = len(shift_a)
    span_lo = np.full(n_combos, np.iinfo(np.int64).max)
    span_hi = np.zeros(n_combos, np.int64)
    np.minimum.at(span_lo, combo, lo)
    np.maximum.at(span_hi, combo, hi + 1)
    used = span_hi > 0
    length = np.where(used, span_hi - span_lo, 0)
    offset = np.cumsum(length) - length
    owner = np.repeat(np.arange(n_combos), length)
    position = np.arange(int(length.sum())) - offset[owner] + span_lo[owner]
    tp = (x[position] - shift_a[owner]).astype(np.float64)
    fp = (y[position] - shift_b[owner]).astype(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        values = tp / (fp + tp + epsilon)  # as average_precision.interpolated_precision
    start = offset[combo] + lo - span_lo[combo]
    stop = offset[combo] + hi - span_lo[combo]
    level = np.floor(np.log2(stop - start + 1)).astype(np.uint8)
    by_level = np.argsort(level, kind="stable")  # radix sort on 8-bit keys
    bounds = np.searchsorted(level[by_level], np.arange(int(level.max()) + 2))
    table = values
    for lev in range(int(level.max()) + 1):
        if lev:
            half = 1 << (lev - 1)
            table = np.maximum(table[:-half], table[half:])
        pick = by_level[bounds[lev] : bounds[lev + 1]]
        if len(pick):
            out[pick] = np.maximum(table[start[pick]], table[stop[pick] - (1 << lev) + 1])
    return out


def envelopes(image, tp, n_pos, variants, box_count, recall_points, epsilon, n_images, out=None):
    """Interpolated precision of each variant (image left out) at one IoU slot, shape
    (recall points, variants): ``average_precision.interpolated_precision`` of the remaining
    points, bit for bit; NaN for a variant left without positives."""
    recall_points = np.asarray(recall_points, np.float64)
    at = np.flatnonzero(tp)
    n_points = len(at)
    x = np.arange(1, n_points + 1)
    y = at + 1 - x
    v = len(variants)
    seg_var, start, end, a, b, own_count = _segments(image, tp, at, variants, n_images)
    key_ab = a * (int(b.max(initial=0)) + 1) + b
    combos, combo = np.unique(key_ab, return_inverse=True)
    width = int(b.max(initial=0)) + 1
    shift_a, shift_b = combos // width, combos % width

    n_pos_v = n_pos - box_count[variants].astype(np.float64)
    distinct, which = np.unique(n_pos_v, return_inverse=True)
    first, present = first_points(distinct, recall_points)
    first, present = first[which], present[which]
    reached = first < (n_points - own_count)[:, None]
    qv, qr = np.nonzero(reached)
    rank_first = first[qv, qr]
    # A segment's shift a counts the variant's own TP points before it, so its first
    # point is remaining point number start - a: find the segment of each query there.
    stride = n_points + 1
    s = np.searchsorted(seg_var * stride + (start - a), qv * stride + rank_first, "right") - 1
    q = rank_first + a[s]
    both = _range_max(
        x,
        y,
        epsilon,
        shift_a,
        shift_b,
        np.concatenate([combo, combo[s]]),
        np.concatenate([start, q]),
        np.concatenate([end, end[s]]) - 1,
    )
    full, partial = both[: len(start)], both[len(start) :]
    # Maximum of the later segments of the same variant (-inf after the last).
    per_var = np.bincount(seg_var, minlength=v)
    seg_first = np.cumsum(per_var) - per_var
    rank = np.arange(len(seg_var)) - seg_first[seg_var]
    grid = np.full((v, int(per_var.max(initial=0)) + 1), -np.inf)
    grid[seg_var, rank] = full
    suffix = np.maximum.accumulate(grid[:, ::-1], axis=1)[:, ::-1]
    later = suffix[seg_var, rank + 1]

    out = np.zeros((len(recall_points), v)) if out is None else out
    out[...] = 0.0
    out[qr, qv] = np.maximum(partial, later[s])
    out[:, ~present] = np.nan
    return out
