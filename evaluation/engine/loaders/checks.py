"""Validation shared by every input format, vectorised, reporting the first bad record.

Each check receives the columns of one file and a ``locate(i)`` function that turns a
row number into the human locator of that format (``annotations[12]``, ``line 14``).
"""

import numpy as np

from ..errors import InputError

#: Ground-truth boxes may overhang the frame by this much (px) without being an error:
#: annotation tools round, and published splits carry such boxes.
TRUTH_BOUNDS_TOLERANCE = 1.0


def show(value):
    """A value as the user wrote it: 7, 'f3' (not numpy's np.int64(7))."""
    return repr(value.item() if hasattr(value, "item") else value)


def first(mask):
    hits = np.flatnonzero(mask)
    return int(hits[0]) if len(hits) else None


def fail_at(path, mask, locate, field, message):
    i = first(mask)
    if i is not None:
        raise InputError(
            path, message(i) if callable(message) else message, record=locate(i), field=field
        )


def check_unique(path, values, locate, field):
    """Duplicate ids: the error names the second occurrence and the first."""
    values = np.asarray(values)
    if len(values) < 2:
        return
    order = np.argsort(values, kind="stable")
    ordered = values[order]
    dup = np.flatnonzero(ordered[1:] == ordered[:-1])
    if len(dup):
        later = order[dup + 1]
        i = int(later.min())
        first_seen = int(order[np.searchsorted(ordered, values[i])])
        raise InputError(
            path,
            f"duplicate id {show(values[i])} (first used by {locate(first_seen)})",
            record=locate(i),
            field=field,
        )


def check_finite(path, array, locate, field):
    bad = ~np.isfinite(array)
    if bad.ndim > 1:
        bad = bad.any(axis=1)
    fail_at(path, bad, locate, field, "must be a finite number")


def check_boxes(path, boxes, locate, field="bbox"):
    """Finite boxes with positive width and height."""
    check_finite(path, boxes, locate, field)
    fail_at(
        path, boxes[:, 2] <= 0, locate, field, lambda i: f"width must be > 0, got {boxes[i, 2]:g}"
    )
    fail_at(
        path, boxes[:, 3] <= 0, locate, field, lambda i: f"height must be > 0, got {boxes[i, 3]:g}"
    )


def outside_frame(boxes, width, height, tolerance):
    x, y, w, h = boxes.T
    return (
        (x < -tolerance)
        | (y < -tolerance)
        | (x + w > width + tolerance)
        | (y + h > height + tolerance)
    )


def check_inside(path, boxes, width, height, locate, field="bbox"):
    """Reject ground truth lying outside its image (beyond the tolerance)."""
    bad = outside_frame(boxes, width, height, TRUTH_BOUNDS_TOLERANCE)
    fail_at(
        path,
        bad,
        locate,
        field,
        lambda i: f"box {boxes[i].tolist()} extends outside its {width[i]:g}x{height[i]:g} image",
    )


def clip_to_frame(path, boxes, width, height, locate, policy, field="bbox"):
    """Apply the out-of-frame policy to predictions: ``clip`` (and count) or ``reject``.

    Returns the (possibly clipped) boxes and how many were clipped. A box with no
    area left inside its image is always an error.
    """
    outside = outside_frame(boxes, width, height, 0.0)
    if policy == "reject":
        fail_at(
            path,
            outside,
            locate,
            field,
            lambda i: (
                f"box {boxes[i].tolist()} extends outside its {width[i]:g}x{height[i]:g} "
                "image (policy: reject)"
            ),
        )
        return boxes, 0
    if policy != "clip":
        raise InputError(path, f"unknown out-of-frame policy {policy!r}; use 'clip' or 'reject'")
    if not outside.any():
        return boxes, 0
    x1 = np.clip(boxes[:, 0], 0, width)
    y1 = np.clip(boxes[:, 1], 0, height)
    x2 = np.clip(boxes[:, 0] + boxes[:, 2], 0, width)
    y2 = np.clip(boxes[:, 1] + boxes[:, 3], 0, height)
    clipped = np.where(outside[:, None], np.column_stack([x1, y1, x2 - x1, y2 - y1]), boxes)
    fail_at(
        path,
        (clipped[:, 2] <= 0) | (clipped[:, 3] <= 0),
        locate,
        field,
        lambda i: (
            f"box {boxes[i].tolist()} lies entirely outside its {width[i]:g}x{height[i]:g} image"
        ),
    )
    return clipped, int(outside.sum())


def resolve(path, external, known, locate, field, what):
    """Map external ids to indices into ``known`` (sorted ascending or not).

    Returns int32 indices and a found-mask; the caller decides whether unknown ids
    are an error.
    """
    known = np.asarray(known)
    order = np.argsort(known, kind="stable")
    ordered = known[order]
    pos = np.searchsorted(ordered, external)
    pos_safe = np.minimum(pos, len(ordered) - 1) if len(ordered) else pos
    found = (
        (pos < len(ordered)) & (ordered[pos_safe] == external)
        if len(ordered)
        else np.zeros(len(external), bool)
    )
    index = np.where(found, order[pos_safe] if len(ordered) else 0, -1).astype(np.int32)
    return index, found


def require_found(path, found, external, locate, field, what):
    fail_at(
        path, ~found, locate, field, lambda i: f"{what} {show(external[i])} is not in the split"
    )
