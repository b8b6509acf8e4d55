"""Validation shared by every input format, vectorised, reporting the first bad record.

Each check receives the columns of one file and a ``locate(i)`` function that turns a
row number into the human locator of that format (``annotations[12]``, ``line 14``).
"""

import numpy as np

from ..errors import InputError
from .ids import shown

#: Under the ``reject`` box policy ground truth may still overhang the frame by this
#: much (px): annotation tools round, and published splits carry such boxes.
TRUTH_BOUNDS_TOLERANCE = 1.0

#: What happens to boxes that leave their image: ``keep`` scores them as given (the
#: reference implementations' behaviour, the default), ``clip`` cuts predictions to
#: the frame, ``reject`` refuses them (ground truth beyond the tolerance above too).
BOX_POLICIES = ("keep", "clip", "reject")


def show(value):
    """A value as the user wrote it: 7, 'f3', 2.5 (not numpy's np.int64(7), nor a
    typed key's mark: ``ids``)."""
    typed = shown(value)
    if typed is not None:
        return typed
    if value is None:
        return "null"
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


def check_unique(path, values, locate, field, what="id"):
    """Duplicate ids (or names): the error names the second occurrence and the first."""
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
            f"duplicate {what} {show(values[i])} (first used by {locate(first_seen)})",
            record=locate(i),
            field=field,
        )


def check_finite(path, array, locate, field):
    bad = ~np.isfinite(array)
    if bad.ndim > 1:
        bad = bad.any(axis=1)
    fail_at(path, bad, locate, field, "must be a finite number")


def check_boxes(path, boxes, locate, field="bbox", policy="keep"):
    """Under the ``reject`` policy: finite boxes, whose sums and area are finite too,
    width and height >= 0. Under ``keep`` and ``clip`` every box is scored as given.

    Non-finite values (``NaN``, ``Infinity`` in JSON as Python's ``json`` reads them,
    ``nan``/``inf`` CSV cells, and sums overflowing to inf) are scored with IEEE
    arithmetic as pycocotools 2.0.11 scores them: ``bbIou`` takes C's ``fmin``/``fmax``,
    which return the other operand when one is NaN, and skips a pair only when the
    intersection width or height is ``<= 0`` (false for NaN), so a NaN coordinate can
    still overlap and a NaN area gives a NaN IoU (see ``boxes.pair_iou`` and the
    sequential walk in ``matching``). Counted as ``non_finite``.

    Zero-area boxes are valid, as in the references: under continuous coordinates
    they overlap nothing (IoU 0, pycocotools ``bbIou``); under the VOC devkit's
    inclusive pixels ``x_min == x_max`` is one pixel wide. Negative sizes are scored
    as given under ``keep`` and ``clip``, because the references score them: in
    pycocotools 2.0.11 ``bbIou`` the intersection width ``min(x1 + w1, x2 + w2) -
    max(x1, x2)`` is at most the smaller width, so a box with a negative size
    overlaps nothing (IoU 0), and ``loadRes`` gives a detection the area ``w * h``
    (negative when one side is: outside every size range, so an unmatched one is
    ignored, not a false positive). The VOC devkit computes its overlap from the
    corners with +1, so ``x_max = x_min - 0.5`` is half a pixel wide there.
    ``reject`` refuses them (counted as ``negative_size`` otherwise).
    """
    if policy != "reject":
        return
    check_finite(path, boxes, locate, field)
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        extent = np.column_stack(
            [boxes[:, 0] + boxes[:, 2], boxes[:, 1] + boxes[:, 3], boxes[:, 2] * boxes[:, 3]]
        )
    fail_at(
        path,
        ~np.isfinite(extent).all(axis=1),
        locate,
        field,
        lambda i: f"box {boxes[i].tolist()} is too large to compute with (box policy: reject)",
    )
    fail_at(
        path,
        boxes[:, 2] < 0,
        locate,
        field,
        lambda i: f"width must be >= 0, got {boxes[i, 2]:g} (box policy: reject)",
    )
    fail_at(
        path,
        boxes[:, 3] < 0,
        locate,
        field,
        lambda i: f"height must be >= 0, got {boxes[i, 3]:g} (box policy: reject)",
    )


def non_finite(boxes):
    return ~np.isfinite(boxes).all(axis=1)


def negative_size(boxes):
    return (boxes[:, 2] < 0) | (boxes[:, 3] < 0)


def zero_area(boxes):
    return (boxes[:, 2] == 0) | (boxes[:, 3] == 0)


def check_policy(path, policy):
    if policy not in BOX_POLICIES:
        raise InputError(
            path, f"unknown box policy {policy!r}; use {', '.join(BOX_POLICIES)}", field="boxes"
        )


#: Non-finite boxes are scored (see ``check_boxes``): their arithmetic may make inf or
#: NaN without a warning, as the reference's C and Python floats do.
def ieee():
    return np.errstate(invalid="ignore", over="ignore", under="ignore")


@ieee()
def _corners(boxes):
    """``(left, top, right, bottom)``: a box of negative size spans from ``x + w``
    to ``x``."""
    x, y, w, h = boxes.T
    return np.minimum(x, x + w), np.minimum(y, y + h), np.maximum(x, x + w), np.maximum(y, y + h)


def outside_frame(boxes, width, height, tolerance):
    """Boxes reaching beyond the frame by more than ``tolerance``; False where the
    image size is unknown (NaN compares false)."""
    left, top, right, bottom = _corners(boxes)
    return (
        (left < -tolerance)
        | (top < -tolerance)
        | (right > width + tolerance)
        | (bottom > height + tolerance)
    )


@ieee()
def wholly_outside(boxes, width, height):
    """Boxes sharing no area with the frame (False where the size is unknown)."""
    left, top, right, bottom = _corners(boxes)
    return (left >= width) | (top >= height) | (right <= 0) | (bottom <= 0)


def require_sizes(path, values, locate, policy, field):
    """``clip`` and ``reject`` need every image's size; ``keep`` needs none."""
    if policy == "keep":
        return
    fail_at(
        path,
        np.isnan(values),
        locate,
        field,
        f"the image has no width/height; the box policy '{policy}' needs every image's size "
        "(use 'keep', or add the sizes)",
    )


def check_inside(path, boxes, width, height, locate, field="bbox"):
    """Reject ground truth lying outside its image (beyond the tolerance)."""
    bad = outside_frame(boxes, width, height, TRUTH_BOUNDS_TOLERANCE)
    fail_at(
        path,
        bad,
        locate,
        field,
        lambda i: (
            f"box {boxes[i].tolist()} extends outside its {width[i]:g}x{height[i]:g} image "
            "(box policy: reject)"
        ),
    )


#: Rows per block where a check would otherwise copy whole columns (peak memory).
BLOCK_ROWS = 1 << 20


def truth_box_counts(boxes, image_width, image_height, box_image):
    """Counts of ground-truth boxes, a block at a time (no full-length temporaries)."""
    counts = dict.fromkeys(
        ("out_of_frame", "zero_area", "negative_size", "on_images_without_size", "non_finite"), 0
    )
    for at in range(0, len(boxes), BLOCK_ROWS):
        block = boxes[at : at + BLOCK_ROWS]
        width = image_width[box_image[at : at + BLOCK_ROWS]]
        height = image_height[box_image[at : at + BLOCK_ROWS]]
        counts["out_of_frame"] += int(outside_frame(block, width, height, 0.0).sum())
        counts["zero_area"] += int(zero_area(block).sum())
        counts["negative_size"] += int(negative_size(block).sum())
        counts["on_images_without_size"] += int((np.isnan(width) | np.isnan(height)).sum())
        counts["non_finite"] += int(non_finite(block).sum())
    return counts


@ieee()
def apply_box_policy(path, boxes, width, height, locate, policy, field="bbox", corners=None):
    """Apply the box policy to predictions; returns the boxes, what was found, and the
    corners as read (``corners``, or None), clipped alike: a clipped box's corners are
    the clipped read corners, so its edges stay what the devkit's would be.

    ``keep``: boxes as given, overhanging and wholly outside ones included (they are
    scored: pycocotools and the VOC devkit never look at the frame). ``clip``: cut to
    the frame, a box wholly outside becomes a zero-area box on the border (a false
    positive that overlaps nothing). ``reject``: any box leaving the frame is an error.
    Counts: ``out_of_frame`` (as given, at least partly outside), ``outside`` (wholly),
    ``clipped``, ``zero_area`` and ``negative_size`` (as scored). Clipping moves each
    corner into the frame and keeps a box's orientation: a box of negative size stays
    negative (or becomes zero-area), so it still overlaps nothing.
    """
    outside = outside_frame(boxes, width, height, 0.0)
    counts = {
        "out_of_frame": int(outside.sum()),
        "outside": int(wholly_outside(boxes, width, height).sum()),
        "clipped": 0,
    }
    if policy == "reject":
        fail_at(
            path,
            outside,
            locate,
            field,
            lambda i: (
                f"box {boxes[i].tolist()} extends outside its {width[i]:g}x{height[i]:g} "
                "image (box policy: reject)"
            ),
        )
    elif policy == "clip" and outside.any():
        x1 = np.clip(boxes[:, 0], 0, width)
        y1 = np.clip(boxes[:, 1], 0, height)
        x2 = np.clip(boxes[:, 0] + boxes[:, 2] if corners is None else corners[:, 2], 0, width)
        y2 = np.clip(boxes[:, 1] + boxes[:, 3] if corners is None else corners[:, 3], 0, height)
        clipped = np.column_stack([x1, y1, x2 - x1, y2 - y1])
        boxes = np.where(outside[:, None], clipped, boxes)
        if corners is not None:
            corners = np.where(outside[:, None], np.column_stack([x1, y1, x2, y2]), corners)
        counts["clipped"] = counts["out_of_frame"]
    counts["zero_area"] = int(zero_area(boxes).sum())
    counts["negative_size"] = int(negative_size(boxes).sum())
    counts["on_images_without_size"] = int((np.isnan(width) | np.isnan(height)).sum())
    counts["non_finite"] = int(non_finite(boxes).sum())
    return boxes, counts, corners


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


def text_start(path, head):
    """Bytes to skip before the text: 3 for a UTF-8 byte-order mark, else 0.

    UTF-16 and UTF-32 files are named as such (the references read UTF-8 only)."""
    if head.startswith(b"\xef\xbb\xbf"):
        return 3
    boms = (
        (b"\xff\xfe\x00\x00", "UTF-32"),
        (b"\x00\x00\xfe\xff", "UTF-32"),
        (b"\xff\xfe", "UTF-16"),
        (b"\xfe\xff", "UTF-16"),
    )
    for bom, name in boms:
        if head.startswith(bom):
            raise InputError(
                path,
                f"the file is {name} text (it starts with a {name} byte-order mark); "
                "save it as UTF-8",
            )
    if len(head) >= 2 and b"\x00" in head[:4]:
        raise InputError(
            path,
            "the file holds NUL bytes at its start: it looks like UTF-16 text without a "
            "byte-order mark, or binary; save it as UTF-8 text",
        )
    return 0
