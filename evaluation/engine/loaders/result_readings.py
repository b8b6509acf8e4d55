"""Results files pycocotools 2.0.11 reads neither as boxes nor as masks.

``COCO.loadRes`` picks one reading for the whole file from its *first* result
(``mask_results.mode``); besides boxes and masks:

* ``'caption' in anns[0]`` (``CAPTION``): nothing is derived, only ``id`` is
  reassigned; ``computeIoU`` reads each result's own ``bbox`` and ``evaluateImg``'s size
  ranges its own ``area`` (``d['area'] < aRng[0]``), as given.
* else, after boxes and masks, ``'keypoints' in anns[0]`` (``KEYPOINTS``): every
  result's ``bbox`` is replaced by the keypoints' extent and its area set from it::

      x, y = kp[0::3], kp[1::3];  x0, x1, y0, y1 = min x, max x, min y, max y
      bbox = [x0, y0, x1 - x0, y1 - y0];  area = (x1 - x0) * (y1 - y0)

  (``np.min``/``np.max``: keypoints of visibility 0 count too; a NaN makes the extent
  NaN.) A list whose length is no multiple of 3 is read the same way, as there.
* none of these keys, or ``bbox: []`` without segmentation or keypoints (``GIVEN``, "as
  given"): nothing is derived, not even ``id``: ``computeIoU`` reads each result's own
  ``bbox``, ``evaluateImg`` its own ``area`` and its own ``id`` (``as_given``: a
  repeated id, an id not above 0). Every record needs an ``id`` a dict can key
  (``createIndex``: KeyError, TypeError).

Where pycocotools raises, the file is refused naming record and field. A missing or
non-number ``area``/``bbox`` makes pycocotools raise only on a detection it compares
(the top 100 per image and listed class: ``computeIoU``, ``evaluateImg``), so such a
record is *unfit* here (``Decoded.unfit``: field and message): refused by
``detection_blocks.resolve`` when it is compared, left out and counted when it is not
(``uncompared``); a ``bbox`` of uniform nested lists or an RLE object is read only where
its image and class hold no truth (``truthless_boxes``). Keypoints whose x or y values
(the only ones read) are booleans, nested lists, or integers of magnitude 2^30 or more
are run through ``loadRes``' own numpy lines (``_loadres_extent``): where those raise,
the file is refused; where they do not, the record scores with the box and area they
give (booleans as 0/1, an int64 extent wrapped, Python integers of an object array),
read as ``computeIoU`` and ``evaluateImg`` read them; unfit only where ``computeIoU``
cannot make doubles of the box (an integer beyond float64). Checked against pycocotools
2.0.11 in ``tests/engine/test_result_readings.py``, ``test_keypoint_values.py``,
``test_uncompared.py`` and ``test_as_given.py``.
"""

import math
import warnings
from typing import Any

import msgspec
import numpy as np

from ..errors import InputError
from . import json_literals, truthless_boxes, unread_fields
from .ids import JSON_ID

CAPTION, KEYPOINTS, GIVEN = "caption", "keypoints", "given"
MODES = (CAPTION, KEYPOINTS, GIVEN)
_INT_LIMIT = 1 << 30


class Reading(msgspec.Struct, gc=False):
    image_id: JSON_ID
    category_id: JSON_ID
    score: Any = None
    bbox: Any = msgspec.UNSET
    area: Any = msgspec.UNSET
    keypoints: Any = msgspec.UNSET
    id: Any = msgspec.UNSET


def _fail(path, record, field, message):
    raise InputError(path, message, record=f"record {record}", field=field)


class Decoded(list):
    """The records of a slice; ``unfit``: per record None, or ``(field, message)`` when
    pycocotools would fail on it only if it compares it (``uncompared``), ``(field,
    message, kind)`` when only where it compares it beside another kind or, a box
    ``truthless_boxes.kind`` names, with truth; ``ids``: the records' own ids under
    ``GIVEN``."""

    unfit = None
    ids = None


_NAN_BOX = (math.nan,) * 4


def decode(piece, path, base, mode, scores=None):
    """The records of a slice under ``mode``, each with ``bbox`` a 4-tuple of floats,
    ``score`` a float (``BAD_SCORE`` when missing or not a number) and ``area`` a float;
    ``scores``: a list given the raw scores (``exact_scores``)."""
    loose = json_literals.decode(piece, list[Reading])
    if scores is not None:
        scores.append([r.score for r in loose])
    fix = {CAPTION: _caption, KEYPOINTS: _keypoints, GIVEN: _given}[mode]
    records = Decoded(loose)
    records.unfit = [fix(path, r, base + i) for i, r in enumerate(loose)]
    if mode == GIVEN:
        records.ids = [r.id for r in loose]
    for r in loose:
        score = unread_fields.as_number(r.score)
        r.score = unread_fields.BAD_SCORE if score is None else score
    return records


def _unfit(r, field, message):
    """Mark ``r`` unfit (no box, no area: never compared if it stays)."""
    r.bbox, r.area = _NAN_BOX, math.nan
    return field, message


_GIVEN_WHY = (
    "the file's first result has none of caption, bbox (or an empty one), segmentation "
    "and keypoints, so pycocotools 2.0.11 reads "
)


def _given(path, r, at):
    """As ``_caption`` (own bbox and area), and the record's own ``id``: required and
    hashable on every record (``createIndex``); one numpy cannot write into a float
    array (``gtm[t, g] = d['id']``: text that is no number, an int beyond float64) is
    refused only if the detection matches a box (``as_given.unwritable``)."""
    if r.id is msgspec.UNSET:
        _fail(path, at, "id", f"missing: {_GIVEN_WHY}each result's own id (createIndex: KeyError)")
    if isinstance(r.id, (list, dict)):
        _fail(
            path, at, "id", f"must be a number or text, got {r.id!r:.40} (createIndex: TypeError)"
        )
    return _caption(path, r, at, _GIVEN_WHY)


def as_float(value):
    """``value`` as numpy writes it into a float64 array (``gtm[t, g] = value``: text
    parsed as Python's ``float``, null NaN, a boolean 0/1), or None where that raises."""
    cell = np.zeros(1)
    try:
        cell[0] = value
    except (ValueError, TypeError, OverflowError):
        return None
    return float(cell[0])


def _caption(path, r, at, why=None):
    """``r``'s own bbox and area, checked as ``computeIoU``/``evaluateImg`` read them;
    None, or the unfit field and message (``Decoded.unfit``)."""
    why = why or "the file's first result has a caption key, so pycocotools 2.0.11 reads "
    if r.bbox is msgspec.UNSET:
        return _unfit(r, "bbox", f"missing: {why}each result's own bbox (computeIoU: KeyError)")
    box = unread_fields._box(r.bbox, text=True, null=True)  # numpy reads it in computeIoU
    kind = None if box is not None else truthless_boxes.kind(r.bbox)
    if box is None and kind is None:
        return _unfit(r, "bbox", f"must be 4 numbers [x, y, w, h], got {r.bbox!r:.40}")
    if r.area is msgspec.UNSET:
        return _unfit(r, "area", f"missing: {why}each result's own area (evaluateImg: KeyError)")
    if type(r.area) not in (int, float, bool):
        return _unfit(r, "area", f"must be a number ({why}it as given), got {r.area!r:.40}")
    if kind is not None:  # read only where no truth is (``truthless_boxes``): NaN here
        given, r.bbox, r.area = r.bbox, _NAN_BOX, _float(r.area)
        return "bbox", truthless_boxes.message(kind, given), kind
    r.bbox, r.area = box, _float(r.area)
    return None


def _float(value):
    try:
        return float(value)
    except OverflowError:  # an integer beyond float64 compares as infinite
        return math.inf if value > 0 else -math.inf


def _keypoints(path, r, at):
    kp = r.keypoints
    if kp is msgspec.UNSET:
        _fail(
            path,
            at,
            "keypoints",
            "missing: the file's first result has keypoints (and no bbox or "
            "segmentation), so pycocotools 2.0.11 reads every result's keypoints "
            "(loadRes: KeyError)",
        )
    if not isinstance(kp, list) or len(kp) < 2:
        _fail(
            path,
            at,
            "keypoints",
            f"must be a list [x1, y1, v1, ...] of at least 2 numbers, got {kp!r:.40} "
            "(pycocotools 2.0.11's np.min of no keypoints raises)",
        )
    xs, ys = kp[0::3], kp[1::3]  # loadRes reads no other value (visibilities unread)
    read = xs + ys
    types = set(map(type, read))
    if not types <= _NUMBER_TYPES or (int in types and not _small_ints(read)):
        return _odd_keypoints(path, at, r, xs, ys)
    x0, x1 = _extent(xs, float in types)
    y0, y1 = _extent(ys, float in types)
    r.bbox = (x0, y0, x1 - x0, y1 - y0)
    r.area = (x1 - x0) * (y1 - y0)
    return None


_NUMBER_TYPES = frozenset((int, float))


def _small_ints(kp):
    return all(-_INT_LIMIT < v < _INT_LIMIT for v in kp if type(v) is int)


def _odd_keypoints(path, at, r, xs, ys):
    """Keypoints holding something besides floats and small integers (booleans, nested
    lists, big integers...): ``loadRes``' own lines run on them as written; where they
    raise, the file is refused. Else the record scores with what they give: its box as
    ``computeIoU`` reads it (``np.array(..., dtype=np.double)``: booleans as 0/1, an
    int64 extent wrapped as there), its area as ``evaluateImg`` compares it; a box
    numpy cannot make doubles of (an integer beyond float64) raises only there, so the
    record is unfit (refused only if compared)."""
    try:
        box, area = _loadres_extent(xs, ys)
    except Exception as e:  # noqa: BLE001 - whatever numpy raises, pycocotools raises
        _fail(
            path,
            at,
            "keypoints",
            f"must hold numbers, got {_odd_value(xs + ys)!r:.40} (pycocotools 2.0.11's "
            f"loadRes raises {type(e).__name__} on these keypoints)",
        )
    try:
        r.bbox = tuple(np.array([box], dtype=np.double)[0].tolist())
    except (OverflowError, ValueError, TypeError) as e:
        return _unfit(
            r,
            "keypoints",
            f"must hold numbers whose extent is a box of doubles, got "
            f"{_odd_value(xs + ys)!r:.40} (pycocotools 2.0.11's computeIoU raises "
            f"{type(e).__name__} on a detection it compares)",
        )
    r.area = _compared_area(area)
    return None


def _compared_area(value):
    """An area ``loadRes`` gave (a numpy scalar, or a Python number from an object
    array) as a float that ``evaluateImg``'s ``d['area'] < aRng[0] or d['area'] >
    aRng[1]`` compares alike: the bounds are integers below 2**53, so rounding keeps
    every comparison; an integer beyond float64 is infinite there."""
    if isinstance(value, np.generic):
        with np.errstate(all="ignore"):
            return float(value)
    return _float(value)


def _loadres_extent(x, y):
    """The lines of pycocotools 2.0.11 ``loadRes`` that read keypoints, as written
    there (numpy picks the types; warnings as there are not errors)."""
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        x0, x1, y0, y1 = np.min(x), np.max(x), np.min(y), np.max(y)
        return [x0, y0, x1 - x0, y1 - y0], (x1 - x0) * (y1 - y0)


def _odd_value(kp):
    """The first value that is no float and no integer of magnitude below 2^30."""
    for v in kp:
        t = type(v)
        if t is float or (t is int and -_INT_LIMIT < v < _INT_LIMIT):
            continue
        return v
    return None


def _extent(values, floats):
    """(min, max) as ``np.min``/``np.max`` give them: NaN if any value is NaN."""
    if floats and any(map(math.isnan, values)):
        return math.nan, math.nan
    return float(min(values)), float(max(values))


def area(records):
    """The area column of records ``decode`` gave."""
    return np.fromiter((r.area for r in records), np.float64, len(records))
