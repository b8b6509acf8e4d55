"""Detection results given as compressed RLE masks, read as pycocotools 2.0.11 reads them.

pycocotools' ``COCO.loadRes`` picks one reading for the whole file from its *first*
result: ``'bbox' in anns[0] and not anns[0]['bbox'] == []`` → every result is a box
(area w·h); else ``'segmentation' in anns[0]`` → every result's ``area`` is
``maskUtils.area(segmentation)`` and a result without ``bbox`` gets
``maskUtils.toBbox(segmentation)``; a result that gives a ``bbox`` keeps it (with the
mask's area). Under ``iouType='bbox'`` matching reads the box and ``evaluateImg``'s
size ranges read that area. ``mode`` makes the first choice; ``columns`` the rest
(area and boxes: ``rle``). Where pycocotools raises (or crashes), the file is refused
naming record and field; a given ``bbox`` that is not 4 numbers raises there only in
``computeIoU``, on a detection it compares, so such a record is unfit
(``result_readings.Decoded``): refused if compared, else left out and counted
(``uncompared``) — but for a box of uniform nested lists or an RLE object, read only
where no truth is (``truthless_boxes``). Checked by running pycocotools 2.0.11 (``tests/engine/
test_mask_results.py``, ``tests/engine/test_uncompared.py``).
"""

import math
from typing import Any

import msgspec
import numpy as np

from ..errors import InputError
from . import json_literals, result_readings, rle, truthless_boxes, unread_fields
from .ids import JSON_ID
from .ids import SURROGATE as _SURROGATE

BOXES, MASKS = "bbox", "mask"
_MAX_SIZE = 1 << 64  # ``siz`` (unsigned long) in pycocotools' _mask.pyx


class _First(msgspec.Struct, gc=False):
    caption: Any = msgspec.UNSET
    bbox: Any = msgspec.UNSET
    segmentation: Any = msgspec.UNSET
    keypoints: Any = msgspec.UNSET


class Rle(msgspec.Struct, gc=False):
    size: tuple[int, int]
    counts: str


class MaskDetection(msgspec.Struct, gc=False):
    image_id: JSON_ID
    category_id: JSON_ID
    score: float
    segmentation: Rle | msgspec.UnsetType = msgspec.UNSET
    bbox: tuple[float, float, float, float] | msgspec.UnsetType = msgspec.UNSET


class LooseMaskDetection(msgspec.Struct, gc=False):
    image_id: JSON_ID
    category_id: JSON_ID
    score: Any = None
    segmentation: Any = msgspec.UNSET
    bbox: Any = msgspec.UNSET


def mode(first_slice):
    """The reading pycocotools' ``loadRes`` picks from the first record of a results
    array (a slice of it beginning with ``[``, ending after whole records), in its
    order: ``result_readings.CAPTION``, ``BOXES``, ``MASKS``, ``result_readings.
    KEYPOINTS``, else ``result_readings.GIVEN``; ``BOXES`` for no records; None when
    the slice does not decode (it may end inside a record: the reader takes more, or
    reports the error)."""
    try:
        records = json_literals.decode(first_slice, list[_First])
    except (msgspec.DecodeError, msgspec.ValidationError, InputError):
        return None
    if not records:
        return BOXES
    first = records[0]
    if first.caption is not msgspec.UNSET:
        return result_readings.CAPTION
    if first.bbox is not msgspec.UNSET and first.bbox != []:
        return BOXES
    if first.segmentation is not msgspec.UNSET:
        return MASKS
    if first.keypoints is not msgspec.UNSET:
        return result_readings.KEYPOINTS
    return result_readings.GIVEN


def decode(piece, path, base):
    """Typed mask-reading records of a slice; a slice whose typed decode fails is
    decoded loosely and each record checked (``normalise``)."""
    try:
        return json_literals.decode(piece, list[MaskDetection])
    except msgspec.ValidationError:
        return normalised(path, json_literals.decode(piece, list[LooseMaskDetection]), base)


def normalised(path, loose, base):
    """Loosely decoded records as ``MaskDetection``s (``normalise``), with their unfit
    fields (``result_readings.Decoded``)."""
    records = result_readings.Decoded()
    records.unfit = []
    for i, r in enumerate(loose):
        try:
            record, unfit = normalise(path, r, base + i)
        except InputError:
            columns(records, path, base)  # an earlier record's failure comes first
            raise
        records.append(record)
        records.unfit.append(unfit)
    return records


def _fail(path, record, field, message):
    raise InputError(path, message, record=f"record {record}", field=field)


def normalise(path, r, at):
    """One loosely decoded record as a ``MaskDetection`` and None, or with its bbox
    NaN and the unfit ``(field, message)`` when that bbox is not 4 numbers (pycocotools
    raises on it only in ``computeIoU``); an error naming it where ``loadRes`` raises."""
    box, unfit = r.bbox, None
    if box is not msgspec.UNSET:
        box = unread_fields._box(box, text=True, null=True)  # numpy reads it in computeIoU
        if box is None:
            box = (math.nan,) * 4
            kind = truthless_boxes.kind(r.bbox)  # read only where no truth is
            if kind is None:
                unfit = ("bbox", f"must be 4 numbers [x, y, w, h], got {r.bbox!r:.40}")
            else:
                unfit = ("bbox", truthless_boxes.message(kind, r.bbox), kind)
    score = unread_fields.as_number(r.score)
    seg = r.segmentation
    if isinstance(seg, list) and seg and all(isinstance(e, dict) for e in seg) or seg == []:
        seg, box, unfit = _masks(path, seg, box, unfit, at)
    else:
        seg = _segmentation(path, seg, at)
    record = MaskDetection(
        r.image_id,
        r.category_id,
        unread_fields.BAD_SCORE if score is None else score,
        seg,
        box,
    )
    return record, unfit


def _masks(path, seg, box, unfit, at):
    """A list of RLE masks: ``maskUtils.area`` (and ``toBbox`` without a box) read
    each one, so each is checked as a single mask is (refused where they raise or
    crash); the area is then an array, which ``evaluateImg`` cannot compare beside
    other detections' areas (``np.array`` of mixed shapes, ValueError), nor
    ``computeIoU`` the array box ``toBbox`` gives: the record is unfit (refused where
    compared). But a list of *one* mask with a box of 4 numbers has an area array of
    one entry, which ``evaluateImg``'s ``d['area'] < aRng[0] or ...`` reads as that
    number and its ``np.array`` joins beside other such arrays: it is loaded with the
    mask's area and its box, and refused only where compared beside a detection of
    another kind (``uncompared.mixed``: kind ``ONE_MASK``)."""
    masks = [_segmentation(path, e, at) for e in seg]
    probe = [MaskDetection(0, 0, 0.0, m, box) for m in masks]
    try:
        columns(probe, path, 0)
    except InputError as e:
        raise InputError(path, e.message, record=f"record {at}", field=e.field) from None
    if len(masks) == 1 and box is not msgspec.UNSET and (unfit is None or len(unfit) == 3):
        why = (
            "a list of one mask with a bbox: pycocotools 2.0.11 reads its area as an "
            "array of one, which evaluateImg's np.array cannot join beside a detection "
            "whose area is a number (ValueError) in its image and class"
        )
        if unfit is not None:  # a box read only where no truth is: both kinds at once
            return masks[0], box, (unfit[0], f"{unfit[1]}; and {why}", (ONE_MASK, unfit[2]))
        return masks[0], box, ("segmentation", why, ONE_MASK)
    why = (
        f"a list of {len(masks)} masks"
        + ("" if box is not msgspec.UNSET else " without bbox")
        + ": pycocotools 2.0.11 reads an array area (and box) from it, which evaluateImg "
        "(or computeIoU) cannot compare"
    )
    return Rle((0, 0), ""), (math.nan,) * 4, _plain(unfit) or ("segmentation", why)


def _plain(unfit):
    """``unfit`` if it is a ``(field, message)`` entry (one pycocotools fails on
    wherever it compares it), else None."""
    return unfit if unfit is not None and len(unfit) == 2 else None


#: The ``uncompared.kinds`` of a list of one mask with a box (``_masks``).
ONE_MASK = "one mask in a list"


def _segmentation(path, seg, at):
    if seg is msgspec.UNSET:
        return seg  # refused in ``columns``, with the others
    if isinstance(seg, list):
        kind = "polygons" if seg and all(isinstance(p, list) for p in seg) else "a list"
        _fail(
            path,
            at,
            "segmentation",
            f"{kind}: the file's first result has a segmentation and no bbox, so "
            "pycocotools 2.0.11 reads every result as one compressed RLE mask "
            "({size: [h, w], counts: text}); maskUtils.area raises on this",
        )
    if not isinstance(seg, dict):
        _fail(path, at, "segmentation", f"must be an RLE object {{size, counts}}, got {seg!r:.40}")
    counts = seg.get("counts", msgspec.UNSET)
    if isinstance(counts, list):
        _fail(
            path,
            at,
            "segmentation.counts",
            "uncompressed RLE (counts as a list of numbers): pycocotools 2.0.11 reads "
            "only compressed RLE text here (maskUtils.area raises TypeError)",
        )
    if not isinstance(counts, str):
        _fail(path, at, "segmentation.counts", f"must be compressed RLE text, got {counts!r:.40}")
    size = seg.get("size", msgspec.UNSET)
    if not isinstance(size, list) or len(size) < 2:
        _fail(path, at, "segmentation.size", f"must be [height, width], got {size!r:.40}")
    return Rle((_side(path, size[0], at), _side(path, size[1], at)), counts)


def _side(path, value, at):
    """A size entry as Cython's conversion to ``siz`` reads it: ``int(value)`` of a
    number or boolean (a float truncated), 0 <= v < 2^64."""
    if type(value) not in (int, float, bool) or (type(value) is float and not math.isfinite(value)):
        _fail(path, at, "segmentation.size", f"must be whole numbers, got {value!r:.40}")
    return int(value)


def columns(records, path, base):
    """``(boxes, area)`` of typed mask-reading records: the given box or the mask's
    (``rle.to_bbox``), and the mask's area (``rle.area``). Where ``loadRes`` raises or
    crashes, the error names the first such record in file order, and of its checks
    the first ``loadRes`` meets (``_first_failure``)."""
    n = len(records)
    texts, h, w = [""] * n, np.zeros(n, object), np.zeros(n, object)
    boxes, given = np.full((n, 4), np.nan), np.zeros(n, bool)
    missing = []
    for i, r in enumerate(records):
        seg = r.segmentation
        if seg is msgspec.UNSET:
            missing.append(i)
            continue
        texts[i], (h[i], w[i]) = seg.counts, seg.size
        if r.bbox is not msgspec.UNSET:
            boxes[i], given[i] = r.bbox, True
    bad = [not (0 <= a < _MAX_SIZE and 0 <= b < _MAX_SIZE) for a, b in zip(h, w)]
    lone = [not t.isascii() and _SURROGATE.search(t) is not None for t in texts]
    h = np.array([v & 0xFFFFFFFF for v in h], np.uint64)
    w = np.array([v & 0xFFFFFFFF for v in w], np.uint64)
    if any(lone):
        texts = ["" if x else t for t, x in zip(texts, lone)]
    values, n_values, unterminated = rle.decode(texts)
    if unterminated.any():  # the others decoded, for their own checks
        values, n_values, _ = rle.decode(["" if u else t for t, u in zip(texts, unterminated)])
    derive = ~given
    crash = rle.zero_height(values, n_values, h) & derive
    if missing or any(bad) or any(lone) or unterminated.any() or crash.any():
        raise _first_failure(path, base, missing, bad, lone, unterminated, crash, h, w)
    boxes[derive] = rle.to_bbox(values, n_values, h, w)[derive]
    return boxes, rle.area(values, n_values)


def _first_failure(path, base, missing, bad, lone, unterminated, crash, h, w):
    """The error of the first failing record in file order; within a record, in the
    order pycocotools 2.0.11 meets them: ``ann['segmentation']`` (KeyError), ``_frString``
    encoding the counts (UnicodeEncodeError) then converting the size to ``siz``
    (OverflowError), ``rleFrString`` reading the text, ``toBbox`` after ``area``."""
    found = []
    if missing:
        found.append((missing[0], 0, "segmentation", _MISSING))
    if any(lone):
        found.append((lone.index(True), 1, "segmentation.counts", _LONE))
    if any(bad):
        i = bad.index(True)
        found.append((i, 2, "segmentation.size", f"must be 0..2^64-1, got {[h[i], w[i]]}"))
    if unterminated.any():
        found.append((int(np.argmax(unterminated)), 3, "segmentation.counts", _UNTERMINATED))
    if crash.any():
        found.append((int(np.argmax(crash)), 4, "segmentation.size", _ZERO_HEIGHT))
    i, _, field, message = min(found)
    return InputError(path, message, record=f"record {base + i}", field=field)


_MISSING = (
    "missing: the file's first result has a segmentation and no bbox, so "
    "pycocotools 2.0.11 reads every result's segmentation (loadRes: KeyError)"
)
_LONE = (
    "holds a lone UTF-16 surrogate (a \\udXXX escape): pycocotools 2.0.11 encodes "
    "the text as UTF-8 (str.encode), which raises UnicodeEncodeError"
)
_UNTERMINATED = (
    "the text ends inside a value (its last character says more follow; "
    "pycocotools would read past the end of the text)"
)
_ZERO_HEIGHT = (
    "a height of 0 (modulo 2^32) with foreground: pycocotools 2.0.11's "
    "maskUtils.toBbox divides by the height and crashes"
)
