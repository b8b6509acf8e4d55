"""A result's ``bbox`` as pycocotools 2.0.11 reads it in the box reading.

When a results file's first result has a non-empty ``bbox`` (``mask_results.BOXES``),
``COCO.loadRes`` runs, on every result::

    bb = ann['bbox']
    x1, x2, y1, y2 = [bb[0], bb[0]+bb[2], bb[1], bb[1]+bb[3]]
    ann['area'] = bb[2]*bb[3]

Only ``bb[0..3]`` are read, with Python's ``+`` and ``*``: where those lines raise
(no bbox, null, a number, an object, fewer than 4 entries, entries Python cannot add
or multiply: ``[1, null, 3, 4]``, ``["1", "2", "3", "4"]``) the file is refused on any
record (``load_error``). Where they do not, a box that is not 4 numbers (5 or more
entries, nested lists, text such as ``["1", 2, "3", 4]`` whose area is text) makes
pycocotools raise only on a detection it compares (``maskUtils.iou`` needs Nx4 numbers,
``evaluateImg`` compares the area): the record is *unfit* (``result_readings.
Decoded.unfit``), refused when compared, else left out and counted (``uncompared``).
Checked by running pycocotools 2.0.11 on each shape in ``tests/engine/test_box_shapes.py``.
"""

import msgspec

_NUMBER = (int, float, bool)
_INTEGER = (int, bool)
_SEQUENCE = (str, list)
#: Past this many items, ``text * n`` or ``list * n`` is taken to fail in
#: pycocotools (MemoryError; OverflowError beyond 2^63). Known deviation: below
#: it, pycocotools may still run out of memory where it is read here as unfit.
_MAX_REPEAT = 1 << 31


def load_error(bbox):
    """Why ``loadRes``' box lines raise on ``bbox`` (msgspec.UNSET: the key is
    missing), or None where they do not."""
    if bbox is msgspec.UNSET:
        return (
            "missing: the file's first result has a bbox, so pycocotools 2.0.11 reads "
            "every result's bbox (loadRes: KeyError)"
        )
    if isinstance(bbox, dict):
        return f"must be a list [x, y, w, h], got {bbox!r:.40} (loadRes: bb[0] raises KeyError)"
    if not isinstance(bbox, _SEQUENCE):
        return f"must be a list [x, y, w, h], got {bbox!r:.40} (loadRes: bb[0] raises TypeError)"
    if len(bbox) < 4:
        return (
            f"must be 4 numbers [x, y, w, h], got {bbox!r:.40} (loadRes: bb[3] raises IndexError)"
        )
    x, y, w, h = bbox[:4]
    why = _add(x, w) or _add(y, h) or _multiply(w, h)
    if why:
        return f"must be 4 numbers [x, y, w, h], got {bbox!r:.40} (loadRes raises {why})"
    return None


def _add(a, b):
    """Why Python's ``a + b`` raises on JSON values, or None."""
    if isinstance(a, _NUMBER) and isinstance(b, _NUMBER):
        return None
    if type(a) is type(b) and isinstance(a, _SEQUENCE):
        return None
    return f"TypeError on {_name(a)} + {_name(b)}"


def _multiply(a, b):
    """Why Python's ``a * b`` raises on JSON values, or None."""
    if isinstance(a, _NUMBER) and isinstance(b, _NUMBER):
        return None
    if isinstance(a, _SEQUENCE) and isinstance(b, _INTEGER):
        seq, n = a, b
    elif isinstance(b, _SEQUENCE) and isinstance(a, _INTEGER):
        seq, n = b, a
    else:
        return f"TypeError on {_name(a)} * {_name(b)}"
    if len(seq) * max(int(n), 0) >= _MAX_REPEAT:
        return f"MemoryError or OverflowError building {_name(seq)} * {n}"
    return None


def _name(value):
    return {str: "text", list: "list", bool: "boolean", type(None): "null"}.get(
        type(value), type(value).__name__
    )


def unfit_message(bbox):
    """The unfit field's message of a box ``loadRes`` reads but pycocotools cannot
    compare."""
    return (
        f"must be 4 numbers [x, y, w, h], got {bbox!r:.40} (pycocotools 2.0.11 "
        "compares this detection: computeIoU/evaluateImg raise)"
    )
