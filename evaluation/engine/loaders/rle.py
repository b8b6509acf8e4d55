"""Compressed RLE masks (COCO ``segmentation``): counts, area and bounding box.

Written from the published code's logic of pycocotools' ``common/maskApi.c``
(``rleFrString``, ``rleArea``, ``rleToBbox``; cocodataset/cocoapi), vectorised over
many masks at once with numpy. C's unsigned 32-bit arithmetic is kept where it decides
a value:

* ``rleFrString``: each character ``c - 48`` gives 5 bits (``c & 0x1f``), ``c & 0x20``
  says more follow, and the last character's ``c & 0x10`` extends the sign; the C code
  shifts an ``int`` by ``5*k``, which x86 takes modulo 32 (so the 8th character of one
  value lands at bit 3 — checked by running pycocotools 2.0.11); from the 4th value on
  (index m > 2) the value is a delta against the value two before; each value is
  stored as ``uint``, so everything is modulo 2^32. The text is read up to its first
  NUL (a C string).
* ``rleArea``: the sum of the odd runs (foreground), as ``uint``.
* ``rleToBbox`` as pycocotools 2.0.11 ships it (ppwwyyxx/cocoapi ``common/maskApi.c``;
  cocodataset/cocoapi's older one differs on odd counts): column-major; only an even
  number of runs is read (one run alone gives the zero box); for each nonzero
  foreground run, its first pixel ``start`` and last ``cc - 1`` (``uint``, wrapping)
  give ``y = t % h`` and ``x = t / h``; a run whose last column is right of its first
  gives the box the full height ``0..h-1``, others widen ``ys``/``ye``; ``xs`` starts
  at ``w``, ``ys`` at ``h``, ``xe``/``ye`` at 0 (so a mask of only empty foreground
  runs gives ``[w, h, 1 - w, 1 - h]`` modulo 2^32); the box is
  ``[xs, ys, xe - xs + 1, ye - ys + 1]``.
"""

import numpy as np

_U32 = 0xFFFFFFFF


def decode(texts):
    """The run lengths of each compressed RLE text (``str``).

    Returns ``(values, n_values, unterminated)``: the runs of every mask one after the
    other (uint64 holding uint32 values), how many each mask has, and which texts end
    inside a value (their last character says more follow: ``rleFrString`` would read
    past the end of the text; the caller refuses those).
    """
    raw = [t.split("\0", 1)[0].encode("utf-8") for t in texts]
    lengths = np.fromiter(map(len, raw), np.int64, len(raw))
    buf = np.frombuffer(b"".join(raw), np.uint8).astype(np.int64)
    c = (buf - 48) & 0xFF  # char arithmetic: a byte, signed or not, has these bits
    ends = (c & 0x20) == 0
    last = np.cumsum(lengths) - 1
    unterminated = (lengths > 0) & ~ends[np.maximum(last, 0)] if len(buf) else lengths < 0
    if unterminated.any():
        return np.zeros(0, np.uint64), np.zeros(len(raw), np.int64), unterminated
    group_end = np.flatnonzero(ends)
    group_start = np.concatenate([[0], group_end[:-1] + 1]) if len(group_end) else group_end
    group = np.cumsum(np.concatenate([[0], ends[:-1]])) if len(buf) else np.zeros(0, np.int64)
    k = np.arange(len(buf)) - group_start[group]
    bits = ((c & 0x1F) << ((5 * k) & 31)) & _U32
    x = np.bitwise_or.reduceat(bits, group_start) if len(group_start) else bits[:0]
    sign = (c[group_end] & 0x10) != 0
    extension = (_U32 << ((5 * (k[group_end] + 1)) & 31)) & _U32
    x = np.where(sign, x | extension, x).astype(np.uint64)
    # groups per mask: the groups ending inside each text
    n_values = np.diff(np.searchsorted(group_end, np.concatenate([[0], np.cumsum(lengths)])))
    return _undelta(x, n_values), n_values, unterminated


def _undelta(x, n_values):
    """``cnts[m] = x[m] + cnts[m-2]`` for m > 2, per mask, modulo 2^32: two running
    sums, over the odd indices from 1 and the even ones from 2 (index 0 alone)."""
    mask_of = np.repeat(np.arange(len(n_values)), n_values)
    m = np.arange(len(x)) - np.repeat(np.cumsum(n_values) - n_values, n_values)
    chain = 3 * mask_of + np.where(m == 0, 0, np.where(m % 2 == 1, 1, 2))
    order = np.argsort(chain, kind="stable")
    sums = np.cumsum(x[order])  # uint64 wraps: modulo 2^64, so modulo 2^32 too
    keys = chain[order]
    first = np.flatnonzero(np.concatenate([[True], keys[1:] != keys[:-1]])) if len(x) else []
    before = np.zeros(len(x), np.uint64)
    if len(x):
        start_sums = sums[first] - x[order][first]
        before = np.repeat(start_sums, np.diff(np.concatenate([first, [len(x)]])))
    out = np.empty(len(x), np.uint64)
    out[order] = (sums - before) & _U32
    return out


def _segment_sums(values, n_values):
    """Per-mask sums of ``values`` (uint64, wrapping)."""
    sums = np.concatenate([np.zeros(1, np.uint64), np.cumsum(values, dtype=np.uint64)])
    ends = np.cumsum(n_values)
    return sums[ends] - sums[ends - n_values]


def area(values, n_values):
    """``rleArea``: the sum of each mask's odd runs modulo 2^32, as float64."""
    m = np.arange(len(values)) - np.repeat(np.cumsum(n_values) - n_values, n_values)
    odd = np.where(m % 2 == 1, values, np.uint64(0)).astype(np.uint64)
    return (_segment_sums(odd, n_values) & _U32).astype(np.float64)


def to_bbox(values, n_values, h, w):
    """``rleToBbox`` as pycocotools 2.0.11 has it: each mask's ``[x, y, width,
    height]`` (float64), for masks of height ``h`` and width ``w`` (integers, taken
    modulo 2^32 as C's ``uint``). The C code divides by ``h``: a mask with a nonzero
    foreground run and ``h % 2^32 == 0`` crashes it (the caller refuses those,
    ``zero_height``)."""
    n = len(n_values)
    h = np.asarray(h, np.uint64).reshape(n) & _U32
    w = np.asarray(w, np.uint64).reshape(n) & _U32
    used = (n_values // 2) * 2
    box = np.zeros((n, 4))
    mask_of, m, values = _kept(values, n_values, used)
    ends = _running(values, used)  # cc after each run, modulo 2^32
    starts = (ends - values) & _U32
    on = (m % 2 == 1) & (values != 0)
    mask_of, starts, ends = mask_of[on], starts[on], (ends[on] - 1) & _U32
    hh = h[mask_of]
    x0, y0, x1, y1 = starts // hh, starts % hh, ends // hh, ends % hh
    spans = x0 < x1
    xs, xe, ys, ye = w.copy(), np.zeros(n, np.uint64), h.copy(), np.zeros(n, np.uint64)
    np.minimum.at(xs, mask_of, x0)
    np.maximum.at(xe, mask_of, x1)
    np.minimum.at(ys, mask_of[~spans], y0[~spans])
    np.maximum.at(ye, mask_of[~spans], y1[~spans])
    full = np.zeros(n, bool)
    full[mask_of[spans]] = True
    ys = np.where(full, 0, ys)
    ye = np.where(full, (h - 1) & _U32, ye)
    some = used > 0
    box[some, 0], box[some, 1] = xs[some], ys[some]
    box[some, 2] = ((xe - xs + 1) & _U32)[some]
    box[some, 3] = ((ye - ys + 1) & _U32)[some]
    return box


def _kept(values, n_values, used):
    """(mask, index within the mask, value) of each of the first ``used`` runs."""
    mask_of = np.repeat(np.arange(len(n_values)), n_values)
    m = np.arange(len(values)) - np.repeat(np.cumsum(n_values) - n_values, n_values)
    keep = m < used[mask_of]
    return mask_of[keep], m[keep], values[keep]


def _running(values, counts):
    """Per-mask running sums of ``values`` (grouped by ``counts``), modulo 2^32."""
    sums = np.cumsum(values, dtype=np.uint64)  # wraps modulo 2^64: fine modulo 2^32
    given = counts[counts > 0]
    first = np.cumsum(given) - given
    before = np.repeat(sums[first] - values[first], given)
    return (sums - before) & _U32


def zero_height(values, n_values, h):
    """Masks ``rleToBbox`` would divide by a zero height for: ``h % 2^32 == 0`` and a
    nonzero foreground run among the runs it reads."""
    n = len(n_values)
    mask_of, m, values = _kept(values, n_values, (n_values // 2) * 2)
    lit = np.zeros(n, bool)
    lit[mask_of[(m % 2 == 1) & (values != 0)]] = True
    return lit & ((np.asarray(h, np.uint64).reshape(n) & _U32) == 0)
