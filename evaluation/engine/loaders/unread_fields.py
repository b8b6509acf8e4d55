"""Fields pycocotools never reads: read when they hold what we expect, else left unread.

Of a ground-truth file pycocotools 2.0.11 reads only the ids, ``bbox``, ``area`` and
``iscrowd`` (``COCO.createIndex``, ``COCOeval._prepare``, ``computeIoU``,
``evaluateImg``). An image's ``width``/``height``, a category's ``name`` and keys of
our own (``tags``, ``difficult``, ``ignore``, ``occlusion``, ``truncation``, ``visibility``,
``dont_care``) and the city-scale benchmark's ``vis_ratio`` (read as the visibility where
``visibility`` is absent, under ``vis_ratio="read"``) are never looked at there, so a
file holding ``"width": "640"`` or ``"occlusion": "partial"`` is one it scores. Here
such a value, of a type its field cannot hold, is left unread — as if absent — and
counted (``COUNTS``, shown with the split); ``annotations="strict"`` refuses it, naming
the record and the field.

Under ``vis_ratio="as-given"`` the ``vis_ratio`` key is a field the city-scale script
reads (``_prepare`` compares it as it is): any number or boolean is read, never left
unread; null, text or anything else, on which Python raises there, is refused naming
the record and the field when the annotation is scored (kept in ``bad``, as a bad
``bbox``).

An ``iscrowd`` of text or null, which pycocotools does read, is read as it reads it
(``crowd_value``) and counted (``iscrowd_text_or_null``); those ``int`` cannot read
(null, other text, arrays, objects), on which pycocotools' ``computeIoU`` raises where
it scores the box, are scored all the same and counted apart too
(``iscrowd_pycocotools_raises``), so no line says pycocotools reads them.

Clean files never come here: a slice of records is decoded with the typed records
first, and only a slice that fails on one of these fields is decoded again loosely.
"""

import math
import re
import struct
from typing import Any

import msgspec
import numpy as np

from ..errors import InputError
from .ids import JSON_ID

#: Counts of values left unread, by what they are.
COUNTS = (
    "unread_image_sizes",
    "unread_image_tags",
    "unread_category_names",
    "unread_attributes",
    "unread_dont_care",
    "iscrowd_text_or_null",
    "iscrowd_pycocotools_raises",
)
_COUNT_OF = {
    ("images", "width"): "unread_image_sizes",
    ("images", "height"): "unread_image_sizes",
    ("images", "tags"): "unread_image_tags",
    ("categories", "name"): "unread_category_names",
    ("annotations", "iscrowd"): "iscrowd_text_or_null",
    ("annotations", "difficult"): "unread_attributes",
    ("annotations", "ignore"): "unread_attributes",
    ("annotations", "occlusion"): "unread_attributes",
    ("annotations", "truncation"): "unread_attributes",
    ("annotations", "visibility"): "unread_attributes",
    ("annotations", "vis_ratio"): "unread_attributes",
}


class _Image(msgspec.Struct, gc=False):
    id: JSON_ID
    width: Any = None
    height: Any = None
    tags: Any = ()


class _Category(msgspec.Struct, gc=False):
    id: JSON_ID
    name: Any = None


class _Annotation(msgspec.Struct, gc=False):
    id: JSON_ID
    image_id: JSON_ID
    category_id: JSON_ID
    bbox: Any = None
    area: Any = None
    iscrowd: Any = 0
    difficult: Any = 0
    ignore: Any = 0
    occlusion: Any = None
    truncation: Any = None
    visibility: Any = None


class _AnnotationWithVisRatio(_Annotation, gc=False):
    vis_ratio: Any = None


class _AnnotationVisRatioAsGiven(_Annotation, gc=False):
    vis_ratio: Any = msgspec.UNSET  # absent; null decodes as None
    height: Any = msgspec.UNSET  # annotation_flags.height_columns reads it, never here


class Region(msgspec.Struct, gc=False):
    image_id: JSON_ID
    bbox: tuple[float, float, float, float]


LOOSE = {
    "images": list[_Image],
    "categories": list[_Category],
    "annotations": list[_Annotation],
    "dont_care": list[Any],
}
#: The loose annotations of a file read with its ``vis_ratio`` key.
LOOSE_WITH_VIS_RATIO = list[_AnnotationWithVisRatio]
#: The loose annotations of a file read with ``vis_ratio="as-given"``.
LOOSE_VIS_RATIO_AS_GIVEN = list[_AnnotationVisRatioAsGiven]


#: Number fields read loosely: an integer beyond float64 among them is infinite.
_NUMBERS = ("width", "height", "occlusion", "truncation", "visibility", "vis_ratio")


def _number(value):
    return type(value) in (int, float)


def crowd_raises(value):
    """Whether pycocotools 2.0.11's ``computeIoU`` raises on this ``iscrowd``
    (``int(o['iscrowd'])``: TypeError for null, arrays and objects, ValueError for text
    ``int`` does not read), for a value of no number type."""
    if type(value) is not str:
        return True
    try:
        int(value)
    except ValueError:
        return True
    return False


def crowd_value(value):
    """A text or null ``iscrowd`` as the number pycocotools 2.0.11 reads alike:
    ``_prepare`` ignores the box when the value is truthy, ``computeIoU`` passes
    ``int(iscrowd)`` as the crowd flag. Text ``int`` reads (``"1"``, ``" 2 "``) is that
    crowd flag, ``"0"`` an ignored regular box (truthy text, crowd 0: the number 0.5
    here); null, ``""`` and empty arrays or objects are falsy (0); other text, arrays and
    objects, which make ``int`` raise there whenever their image and class are
    evaluated, an ignored regular box."""
    if not value:  # null, "", [] and {}: falsy, as in _prepare
        return 0
    if type(value) is not str:  # an array or object: truthy, int() raises there
        return 0.5
    try:
        number = int(value)
    except ValueError:
        return 0.5
    return number if number != 0 else 0.5


def _fits(key, name, value):
    """Whether ``value`` is what the typed record's field holds."""
    if name == "iscrowd":
        return type(value) in (int, float, bool)
    if name in _NUMBERS:
        return value is None or _number(value)
    if name == "tags":
        return isinstance(value, (list, tuple)) and all(type(t) is str for t in value)
    if name == "name":
        return value is None or type(value) is str
    return type(value) in (int, float, bool)  # difficult, ignore: any number, as truthiness


_DEFAULTS = {"tags": (), "difficult": 0, "ignore": 0}


#: Fields pycocotools reads only of the annotations it scores: a bad value in an
#: annotation it never scores (of an unlisted image or category, or overwritten by a
#: later one with its id) is never looked at there. Such a record is kept with its
#: error (``bad``), raised only if the annotation turns out to be scored.
_DEFERRED = {("annotations", "bbox"), ("annotations", "area")}


def loose_field(key, error_text):
    """Whether a typed decode's error (msgspec's ``... - at `$[3].width```) is about a
    field this module reads loosely."""
    if key == "dont_care":
        return True
    field = _field_of(error_text)
    return (key, field) in _COUNT_OF or (key, field) in _DEFERRED


def _field_of(error_text):
    """The record field a msgspec validation error is about (``$[3].bbox[0]``: bbox)."""
    missing = re.match(r"^Object missing required field `(\w+)`", error_text)
    if missing:
        return missing[1]
    field = error_text.rsplit("`$", 1)[-1].split("]", 1)[-1].lstrip(".").split("[")[0]
    return field.split(".")[0].rstrip("`")


def as_number(value, text=False, null=False):
    """``value`` as the float Python arithmetic and numpy make of it in pycocotools:
    a number (an integer beyond float64 is infinite), a boolean (0 or 1), with ``text``
    a string ``float`` reads (numpy's conversion of a box to doubles), with ``null``
    None as NaN (the same conversion: ``np.array([None], dtype=np.double)``); else
    None."""
    if null and value is None:
        return math.nan
    if type(value) in (int, float, bool):
        try:
            return float(value)
        except OverflowError:
            return math.inf if value > 0 else -math.inf
    if text and type(value) is str:
        try:
            return float(value)
        except ValueError:
            return None
    return None


def _box(value, text, null=False):
    """A box as four floats (``as_number``), or None."""
    if not isinstance(value, (list, tuple)) or len(value) != 4:
        return None
    numbers = [as_number(v, text, null) for v in value]
    return None if None in numbers else tuple(numbers)


def _defer(records, base, bad):
    """Annotations whose ``bbox`` or ``area`` is not what pycocotools can score: kept
    with NaN in its place and their error in ``bad`` (row -> (field, message)). A box
    of booleans or numeric text (numpy reads it in ``computeIoU``) and an area of a
    boolean or a huge integer are read as pycocotools compares them."""
    for i, record in enumerate(records):
        box = _box(record.bbox, text=True)
        if box is None:
            message = f"must be 4 numbers [x, y, w, h], got {record.bbox!r:.40}"
            bad.setdefault(base + i, ("bbox", message))
            box = (math.nan,) * 4
        record.bbox = box
        if record.area is not None:
            area = as_number(record.area)
            if area is None:
                bad.setdefault(base + i, ("area", f"must be a number, got {record.area!r:.40}"))
            record.area = area


#: A detection's score that is missing or not a number, kept as this NaN (its payload
#: marks it) until its class is known: pycocotools reads only the scores of detections
#: of the classes it evaluates (``detection_blocks.resolve`` refuses the others).
BAD_SCORE_BITS = 0x7FF8_0000_0000_0BAD
BAD_SCORE = struct.unpack("<d", struct.pack("<Q", BAD_SCORE_BITS))[0]


class LooseDetection(msgspec.Struct, gc=False):
    image_id: JSON_ID
    category_id: JSON_ID
    bbox: Any = msgspec.UNSET
    score: Any = None


def loose_detection(error_text):
    """Whether a typed decode's error is about a detection's ``bbox`` or ``score``."""
    return _field_of(error_text) in ("bbox", "score")


def normalise_detections(path, records, base):
    """Loosely decoded detections as the typed ones, with their unfit fields
    (``result_readings.Decoded``): a box of 4 numbers or booleans as floats; one
    pycocotools' ``loadRes`` cannot read refused, naming the record; one it reads
    but cannot compare (``box_results``) NaN and unfit. A score of a number or
    boolean as a float, any other (or none) ``BAD_SCORE``."""
    from . import box_results, result_readings

    decoded = result_readings.Decoded(records)
    decoded.unfit = [None] * len(records)
    for i, record in enumerate(records):
        box = _box(record.bbox, text=False)
        if box is None:
            why = box_results.load_error(record.bbox)
            if why is not None:
                raise InputError(path, why, record=f"record {base + i}", field="bbox")
            decoded.unfit[i] = ("bbox", box_results.unfit_message(record.bbox))
            box = (math.nan,) * 4
        record.bbox = box
        score = as_number(record.score)
        record.score = BAD_SCORE if score is None else score
    return decoded


def bad_scores(score):
    """Mask of the scores that were missing or not numbers (``BAD_SCORE``)."""
    score = np.ascontiguousarray(score, np.float64)
    return np.isnan(score) & (score.view(np.uint64) == BAD_SCORE_BITS)


def normalise(key, records, counts, base=0, bad=None, city=None):
    """The loosely decoded ``records`` with every value of a type its field cannot hold
    set to the field's default, counted in ``counts``; regions that are not an object
    with an id and four numbers are left out, counted; annotations with a bad ``bbox``
    or ``area`` kept with their error in ``bad`` (``_DEFERRED``; rows from ``base``);
    a ``vis_ratio`` (as given) or ``ignore`` the CityPersons script raises on, where it
    reads it, in ``city`` (row -> {field: (message, truthy)}: ``cityscale_raises``)."""
    if key == "dont_care":
        kept = []
        for value in records:
            try:
                kept.append(msgspec.convert(value, Region))
            except msgspec.ValidationError:
                counts["unread_dont_care"] += 1
        return kept
    city = {} if city is None else city
    if key == "annotations":
        _defer(records, base, {} if bad is None else bad)
    fields = [name for (k, name) in _COUNT_OF if k == key]
    for i, record in enumerate(records):
        for name in fields:
            if name not in record.__struct_fields__:  # vis_ratio, when not read
                continue
            value = getattr(record, name)
            if isinstance(record, _AnnotationVisRatioAsGiven) and name == "vis_ratio":
                record.vis_ratio = _as_given(value, base + i, city)
            elif key == "annotations" and name == "ignore" and not _fits(key, name, value):
                fault = ignore_fault(value)
                if fault:
                    city.setdefault(base + i, {})["ignore"] = (fault, bool(value))
                if value:  # truthy: an ignore box of the script, its int() the crowd flag
                    crowd = not fault and int(value) != 0
                    city.setdefault(base + i, {})["ignore_read"] = (crowd, True)
                record.ignore = 0
                counts[_COUNT_OF[key, name]] += 1
            elif not _fits(key, name, value):
                fixed = crowd_value(value) if name == "iscrowd" else _DEFAULTS.get(name)
                setattr(record, name, fixed)
                counts[_COUNT_OF[key, name]] += 1
                if name == "iscrowd" and crowd_raises(value):
                    counts["iscrowd_pycocotools_raises"] += 1
            elif name == "difficult":
                setattr(record, name, bool(value))
            elif name == "ignore":  # its value, not only its truth (ignore_key_fraction);
                # an integer beyond float64 kept whole: the script's int() takes it
                setattr(record, name, value if type(value) is int else as_number(value))
            elif name in _NUMBERS and value is not None:
                setattr(record, name, as_number(value))
    return records


def ignore_fault(value):
    """Why the CityPersons script's ``computeIoU`` raises on ``int(o['ignore'])`` with
    ``value`` (ValueError for NaN and text ``int`` does not read, OverflowError for an
    infinity, TypeError for null, arrays and objects), or None where ``int`` reads it."""
    if type(value) in (int, bool):
        return None
    try:
        int(value)
        return None
    except (ValueError, OverflowError, TypeError):
        pass
    if type(value) is float:
        shown = "NaN" if math.isnan(value) else ("Infinity" if value > 0 else "-Infinity")
    else:
        shown = "null" if value is None else f"{value!r:.40}"
    return (
        "must be a number or text that int() reads (the city-scale script's computeIoU "
        f"takes int(ignore) as its crowd flag), got {shown}"
    )


def _as_given(value, row, city):
    """A loosely decoded ``vis_ratio`` under ``vis_ratio="as-given"``: a boolean kept
    (it compares as 0 or 1 in ``_prepare``), a number as ``as_number`` reads it, absent
    kept ``UNSET``; anything else ``UNSET`` with its error in ``city`` (raised only
    where the script compares it: ``_prepare``'s ``or`` reaches the vis_ratio test
    when the height test lets the box through, and raises TypeError; ``cityscale_raises``)."""
    if value is msgspec.UNSET or type(value) is bool:
        return value
    number = as_number(value)
    if number is not None:
        return number
    shown = "null" if value is None else f"{value!r:.40}"
    message = (
        f"must be a number or boolean (the city-scale script compares vis_ratio with "
        f"the setups' ranges), got {shown}"
    )
    city.setdefault(row, {})["vis_ratio"] = (message, bool(value))
    return msgspec.UNSET
