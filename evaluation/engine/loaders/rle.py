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

_U32 = np.uint32(0xFFFFFFFF)


def decode(texts):
    """The run lengths of each compressed RLE text (``str``).

    Returns ``(values, n_values, unterminated)``: the runs of every mask one after the
    other (uint32, as C's ``uint``: numpy's uint32 arithmetic wraps as C's does), how
    many each mask has, and which texts end inside a value (their last character says
    more follow: ``rleFrString`` would read past the end of the text; the caller
    refuses those).
    """
    raw = [t.split("\0", 1)[0].encode("utf-8") for t in texts]
    lengths = np.fromiter(map(len, raw), np.int64, len(raw))
    c = np.frombuffer(b"".join(raw), np.uint8) - np.uint8(48)  # wraps as a C char's bits
    ends = (c & 0x20) == 0
    last = np.cumsum(lengths) - 1
    unterminated = (lengths > 0) & ~ends[np.maximum(last, 0)] if len(c) else lengths < 0
    if unterminated.any():
        return np.zeros(0, np.uint32), np.zeros(len(raw), np.int64), unterminated
    group_end = np.flatnonzero(ends)
    length = np.diff(np.concatenate([[-1], group_end]))  # characters of each value
    x = _bits(c, group_end, length)
    sign = (c[group_end] & 0x10) != 0
    x = np.where(sign, x | (_U32 << _shift(5 * length)), x)
    # groups per mask: the groups ending inside each text
    n_values = np.diff(np.searchsorted(group_end, np.concatenate([[0], np.cumsum(lengths)])))
    return _undelta(x.astype(np.uint32), n_values), n_values, unterminated


#: Values of more characters than this are read a byte at a time, not a column at a time.
_LONGEST_BY_COLUMN = 16


def _bits(c, group_end, length):
    """Each value's 5-bit groups OR'd in place (``x |= (c & 0x1f) << 5*k``)."""
    k_last = length - 1  # the last character's k
    if int(length.max(initial=1)) > _LONGEST_BY_COLUMN:
        k = np.arange(len(c), dtype=np.int64) - np.repeat(group_end - k_last, length)
        bits = (c & 0x1F).astype(np.uint32) << _shift(5 * k)
        return np.bitwise_or.reduceat(bits, group_end - k_last)
    x = (c[group_end] & 0x1F).astype(np.uint32) << _shift(5 * k_last)
    for j in range(1, int(length.max(initial=1))):  # the j-th character before the last
        longer = np.flatnonzero(length > j)
        bits = (c[group_end[longer] - j] & 0x1F).astype(np.uint32)
        x[longer] |= bits << _shift(5 * (k_last[longer] - j))
    return x


def _shift(amount):
    """An ``int`` shift count as x86 takes it: modulo 32."""
    return (amount & 31).astype(np.uint32)


def _index_in_mask(n_values):
    """Each value's index within its mask."""
    total = int(n_values.sum())
    starts = np.repeat((np.cumsum(n_values) - n_values).astype(np.int32), n_values)
    return np.arange(total, dtype=np.int32) - starts


def _per_mask_running(values, n_values):
    """Running sums of uint32 ``values`` within each mask, modulo 2^32."""
    sums = np.cumsum(values, dtype=np.uint32)
    before = np.concatenate([np.zeros(1, np.uint32), sums])[np.cumsum(n_values) - n_values]
    return sums - np.repeat(before, n_values)


def _undelta(x, n_values):
    """``cnts[m] = x[m] + cnts[m-2]`` for m > 2, per mask, modulo 2^32: two running
    sums, over the odd indices from 1 and the even ones from 2 (index 0 alone)."""
    m = _index_in_mask(n_values)
    zero = np.uint32(0)
    odd = (m & 1) == 1
    even = ~odd & (m >= 2)
    out = np.where(m == 0, x, zero)
    out += np.where(odd, _per_mask_running(np.where(odd, x, zero), n_values), zero)
    out += np.where(even, _per_mask_running(np.where(even, x, zero), n_values), zero)
    return out


def area(values, n_values):
    """``rleArea``: the sum of each mask's odd runs modulo 2^32, as float64."""
    odd = np.where((_index_in_mask(n_values) & 1) == 1, values, np.uint32(0))
    sums = np.concatenate([np.zeros(1, np.uint32), np.cumsum(odd, dtype=np.uint32)])
    ends = np.cumsum(n_values)
    return (sums[ends] - sums[ends - n_values]).astype(np.float64)


def _uint(values, n):
    """Integers as C's ``uint`` (modulo 2^32), given below 2^64."""
    return (np.asarray(values, np.uint64).reshape(n) & np.uint64(0xFFFFFFFF)).astype(np.uint32)


def to_bbox(values, n_values, h, w):
    """``rleToBbox`` as pycocotools 2.0.11 has it: each mask's ``[x, y, width,
    height]`` (float64), for masks of height ``h`` and width ``w`` (integers below
    2^64, taken modulo 2^32 as C's ``uint``). The C code divides by ``h``: a mask with a
    nonzero foreground run and ``h % 2^32 == 0`` crashes it (the caller refuses those,
    ``zero_height``)."""
    n = len(n_values)
    h, w = _uint(h, n), _uint(w, n)
    used = (n_values // 2) * 2
    box = np.zeros((n, 4))
    mask_of, m, values = _kept(values, n_values, used)
    ends = _per_mask_running(values, used)  # cc after each run, modulo 2^32
    starts = ends - values
    on = ((m & 1) == 1) & (values != 0)
    mask_of, starts, ends = mask_of[on], starts[on], ends[on] - np.uint32(1)
    # a zero height (mod 2^32) never reaches a box: such a mask is refused, or keeps
    # the box its result gives; divide those by 1 rather than warn
    hh = np.maximum(h[mask_of], np.uint32(1))
    x0, y0, x1, y1 = starts // hh, starts % hh, ends // hh, ends % hh
    spans = x0 < x1
    xs, xe, ys, ye = w.copy(), np.zeros(n, np.uint32), h.copy(), np.zeros(n, np.uint32)
    np.minimum.at(xs, mask_of, x0)
    np.maximum.at(xe, mask_of, x1)
    np.minimum.at(ys, mask_of[~spans], y0[~spans])
    np.maximum.at(ye, mask_of[~spans], y1[~spans])
    full = np.zeros(n, bool)
    full[mask_of[spans]] = True
    ys = np.where(full, np.uint32(0), ys)
    ye = np.where(full, h - np.uint32(1), ye)
    some = used > 0
    one = np.uint32(1)
    box[some, 0], box[some, 1] = xs[some], ys[some]
    box[some, 2] = (xe - xs + one)[some]
    box[some, 3] = (ye - ys + one)[some]
    return box


def _kept(values, n_values, used):
    """(mask, index within the mask, value) of each of the first ``used`` runs."""
    mask_of = np.repeat(np.arange(len(n_values), dtype=np.int32), n_values)
    m = _index_in_mask(n_values)
    keep = m < used[mask_of]
    return mask_of[keep], m[keep], values[keep]


def zero_height(values, n_values, h):
    """Masks ``rleToBbox`` would divide by a zero height for: ``h % 2^32 == 0`` and a
    nonzero foreground run among the runs it reads."""
    n = len(n_values)
    mask_of, m, values = _kept(values, n_values, (n_values // 2) * 2)
    lit = np.zeros(n, bool)
    lit[mask_of[((m & 1) == 1) & (values != 0)]] = True
    return lit & (_uint(h, n) == 0)
