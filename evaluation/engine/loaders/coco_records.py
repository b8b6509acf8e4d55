"""COCO-style JSON records: the typed msgspec structs that ground-truth and detections
files decode into, and what turns their fields into columns and errors: ids as
pycocotools keys them (``whole_ids``, ``int_column``), category names, and msgspec's
validation errors as file / record / field.

Decoding is typed: unknown fields such as segmentation polygons are skipped without
building Python objects.
"""

import re
from typing import Any

import msgspec
import numpy as np

from ..errors import InputError
from .ids import JSON_ID, escaped

#: An id field: any JSON number, boolean or text, as pycocotools keys its dicts by them
#: (``1 == 1.0 == true``, the text ``"1"`` another id); see ``whole_ids`` and ``ids``.
Id = JSON_ID


class _Image(msgspec.Struct, gc=False):
    id: Id
    width: float | None = None  # optional, as in pycocotools; needed only to clip
    height: float | None = None
    tags: list[str] = []


class _Annotation(msgspec.Struct, gc=False):
    id: Id
    image_id: Id
    category_id: Id
    bbox: tuple[float, float, float, float]
    area: float | None = None
    iscrowd: int | float | bool = 0  # any number, as pycocotools (annotation_flags.crowd_columns)
    difficult: int | bool = 0
    ignore: int | float | bool = 0  # read by the pedestrian setups only: ignore_key
    occlusion: float | None = None  # road attributes: loaders.attributes
    truncation: float | None = None
    visibility: float | None = None


class _AnnotationWithVisRatio(_Annotation, gc=False):
    """An annotation read with the city-scale benchmark's ``vis_ratio`` key
    (``vis_ratio="read"``): the visibility where ``visibility`` is absent."""

    vis_ratio: float | None = None


class _AnnotationVisRatioAsGiven(_Annotation, gc=False):
    """An annotation read with its ``vis_ratio`` as the city-scale script reads it
    (``vis_ratio="as-given"``): any number or boolean (``_prepare`` compares it with
    the setups' ranges as it is); null, text or anything else is refused (there
    Python raises on the comparison); absent: ``UNSET``. Its ``height`` key, which
    that ``_prepare`` compares too, is taken whatever it holds (``annotation_flags.
    height_columns`` reads it: a value the script cannot compare is refused by
    ``miss-rate-cityscale`` alone, where it compares it, never on reading)."""

    vis_ratio: float | bool | msgspec.UnsetType = msgspec.UNSET
    height: Any = msgspec.UNSET


class _Region(msgspec.Struct, gc=False):
    image_id: Id
    bbox: tuple[float, float, float, float]


class _Category(msgspec.Struct, gc=False):
    id: Id
    name: str | None = None  # pycocotools never reads it: see category_name


class _Dataset(msgspec.Struct, gc=False):
    images: list[_Image]
    categories: list[_Category]
    annotations: list[_Annotation] = []  # optional, as in pycocotools (nothing to find)
    dont_care: list[_Region] = []


class _Detection(msgspec.Struct, gc=False):
    image_id: Id
    category_id: Id
    bbox: tuple[float, float, float, float]
    score: float


_PATH = re.compile(r"^(?P<msg>.*) - at `\$(?P<path>.*)`$")
_INDEX = re.compile(r"^(?P<key>\.\w+)?\[(?P<i>[0-9]+)\](?P<rest>.*)$")


def category_name(category):
    """A category's name, or for one without a name (pycocotools' evaluation never
    reads names) its id as text; a lone surrogate in either as its escape (``\\ud800``:
    names are shown and written, and no UTF-8 text holds one), so two names may meet
    here and are then told apart as any shared name is."""
    if category.name is not None:
        return escaped(category.name)
    value = category.id
    if type(value) is str:
        return escaped(value)
    whole = type(value) is not float or value.is_integer()
    return str(int(value)) if whole else repr(value)


def _friendly(message):
    message = message.replace("`", "'")
    return message[:1].lower() + message[1:]


def validation_error(path, error, *, top_level_list, base=0, key=""):
    """Turn msgspec's ``... - at `$[3].bbox[2]``` into file / record / field."""
    text = str(error)
    m = _PATH.match(text)
    if not m:
        missing = re.match(r"^Object missing required field `(\w+)`$", text)
        if missing:
            return InputError(path, "missing required field", field=missing[1])
        return InputError(path, _friendly(text))
    message, where = _friendly(m["msg"]), m["path"]
    field_match = re.match(r"^(?P<msg>object missing required field) '(?P<f>\w+)'$", message)
    idx = _INDEX.match(where)
    record, field = "", where.lstrip(".")
    if idx:
        i = int(idx["i"]) + base
        key = (idx["key"] or "").lstrip(".") or key
        record = f"record {i}" if top_level_list else f"{key}[{i}]"
        field = idx["rest"].lstrip(".")
    if field_match:
        message, field = "missing required field", field_match["f"]
    return InputError(path, message, record=record, field=field)


_INT64_MIN, _INT64_MAX = -(2**63), 2**63 - 1
_INT_ONLY = frozenset({int})


def whole_ids(path, values, locate, field):
    """``values`` as pycocotools' dicts key them: a float or boolean with a whole value
    is that integer (``1.0`` and ``true`` are the key 1), any other number stays a
    float (NaN too: the one NaN object Python's ``json`` gives, ``ids.FILE_NAN``, which
    pycocotools' dicts find by identity), text stays text."""
    if set(map(type, values)) <= _INT_ONLY:  # one C-level pass; the common case
        return values
    out = []
    for v in values:
        if type(v) is float:
            out.append(int(v) if v.is_integer() else v)
        else:
            out.append(v if v is None or type(v) is str else int(v))
    return out


def int_column(path, values, locate, field, wide=False):
    """Ids (``whole_ids``) as int64 when all are integers within signed 64 bits. With
    ``wide`` (``ids="any"``) any other id family becomes an object array of the Python
    values (ints, floats, text: ``ids.typed_keys`` reads it); without, an id outside
    that range, fractional or text, is an input error naming it."""
    if set(map(type, values)) <= _INT_ONLY:
        try:
            return np.array(values, np.int64).reshape(-1)
        except OverflowError:
            pass
    if wide:
        return np.array(values, dtype=object).reshape(-1)
    for i, value in enumerate(values):
        if type(value) is not int:
            raise InputError(
                path,
                f"{value!r} is not an integer id (ids=int64 takes signed 64-bit integers)",
                record=locate(i),
                field=field,
            )
        if not _INT64_MIN <= value <= _INT64_MAX:
            raise InputError(
                path,
                f"{value} is outside the supported range of ids (signed 64-bit integers, "
                f"{_INT64_MIN} to {_INT64_MAX})",
                record=locate(i),
                field=field,
            )
    raise AssertionError("unreachable: every id fits int64")
