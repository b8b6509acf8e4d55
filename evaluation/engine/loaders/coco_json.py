"""COCO-style JSON: ground truth (images / annotations / categories) and detections.

Decoding is typed (msgspec structs): unknown fields such as segmentation polygons are
skipped without building Python objects. A detections file is read and decoded in
slices of a few megabytes, each turned into arrays at once, so a file of millions of
detections never exists as Python objects (or as one byte string) all together.
"""

import math
import re
from itertools import chain
from operator import attrgetter

import msgspec
import numpy as np

from ..errors import InputError
from . import json_literals, json_syntax, mask_results, result_readings, unread_fields
from .checks import text_start
from .ids import JSON_ID, escaped

CHUNK_BYTES = 4 << 20
#: No detection record is this long: past it, reading stops with an error instead of
#: buffering a malformed file.
MAX_SLICE_BYTES = 64 << 20
#: A ground-truth file larger than this gets a syntax-only pass before the one that
#: builds columns (about 1 s more per 100 MB), so a syntax error late in it is found at
#: flat memory; below it, the columns built up to such an error are small anyway.
SYNTAX_FIRST_BYTES = 32 << 20
#: A detections file larger than this gets a validation pass that keeps no columns
#: before the one that builds them, so a type error late in it is rejected at flat
#: memory; below it, the columns built up to such an error stay under ~0.7x this size.
VALIDATE_FIRST_BYTES = 128 << 20


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
    iscrowd: int | float | bool = 0  # any number, as pycocotools: see crowd_columns
    difficult: int | bool = 0
    ignore: int | float | bool = 0  # read by the pedestrian setups only: ignore_key
    occlusion: float | None = None  # road attributes: loaders.attributes
    truncation: float | None = None
    visibility: float | None = None


class _AnnotationWithVisRatio(_Annotation, gc=False):
    """An annotation read with the city-scale benchmark's ``vis_ratio`` key
    (``vis_ratio="read"``): the visibility where ``visibility`` is absent."""

    vis_ratio: float | None = None


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
_INDEX = re.compile(r"^(?P<key>\.\w+)?\[(?P<i>\d+)\](?P<rest>.*)$")


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


def _as_float(value):
    try:
        return float(value)
    except OverflowError:
        return math.inf if value > 0 else -math.inf


def whole_ids(path, values, locate, field):
    """``values`` as pycocotools' dicts key them: a float or boolean with a whole value
    is that integer (``1.0`` and ``true`` are the key 1), any other number stays a
    float (NaN too: a reference to it names nothing; an image or category whose own id
    is NaN is refused, ``truth_columns._typed_family``), text stays text."""
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


def read_truth(path, wide=False, loose=False, vis_ratio=False):
    """Decode a COCO-style ground-truth file into plain columns.

    Read a few MB at a time (``json_syntax.check``): the syntax is checked in
    bounded memory, and each checked slice of the ``images``, ``annotations``,
    ``categories`` and ``dont_care`` arrays is decoded into typed records and turned
    into columns at once (``_Records``). The file is never read, mapped or decoded
    whole, so memory is bounded by the columns plus one slice, for a rejected file as
    for an accepted one. Errors are those of a whole-file decode: a syntax error
    anywhere first, then the first type error in file order. A truncated file, or one
    beyond ``SYNTAX_FIRST_BYTES``, gets the syntax check alone first. With ``loose``,
    values pycocotools never reads are left unread when of another type
    (``unread_fields``; counted in the columns' ``unread_counts``). With
    ``vis_ratio`` the annotations' ``vis_ratio`` key is read too (column ``vis_ratio``,
    NaN where absent; ``attributes.finish`` decides which key is the visibility);
    without, it is skipped like any unknown key and the column is all NaN.
    """
    with open(path, "rb") as f:
        size = f.seek(0, 2)
        if size == 0:
            raise InputError(path, "the file is empty")
        f.seek(0)
        skip = text_start(path, f.read(4))
        f.seek(skip)
        head = f.read(4096).lstrip()
        if not head and size <= skip + 4096:
            raise InputError(path, "the file is empty")
        if head.startswith(b"["):
            raise _array_given(path)
        totals = None
        if size - skip > SYNTAX_FIRST_BYTES or not _ends_like_an_object(f, size):
            # A syntax error or truncation is found without building any column; the
            # records it counts let the columns be allocated once, at full length.
            totals = json_syntax.check(path, f, skip).totals
        records = _Records(path, wide, totals, loose, vis_ratio)
        checker = json_syntax.check(path, f, skip, sink=records)
        return records.columns(checker)


def _ends_like_an_object(f, size):
    f.seek(max(size - 4096, 0))
    return f.read().rstrip().endswith(b"}")


def _array_given(path):
    return InputError(
        path,
        "expected a ground-truth object with images, annotations and "
        "categories, got a JSON array (is this a predictions file?)",
    )


class _Outline(msgspec.Struct, gc=False):
    """The outer object so far, arrays emptied: its type errors before a record's."""

    images: list[_Image] = []
    annotations: list[_Annotation] = []
    categories: list[_Category] = []
    dont_care: list[_Region] = []


class _LooseOutline(_Outline, gc=False):
    dont_care: object = None


class _LooseDataset(_Dataset, gc=False):
    dont_care: object = None


_LOOSE_OUTLINES = {_Outline: _LooseOutline, _Dataset: _LooseDataset}

_RECORDS = {
    "images": list[_Image],
    "annotations": list[_Annotation],
    "categories": list[_Category],
    "dont_care": list[_Region],
}
#: Ids out of the int64 range are reported in this order (after any type error).
_ID_FIELDS = (
    ("images", "id"),
    ("categories", "id"),
    ("annotations", "id"),
    ("annotations", "image_id"),
    ("annotations", "category_id"),
    ("dont_care", "image_id"),
)
#: Value errors found while building columns, reported after the ids' (in this order).
_VALUE_FIELDS = _ID_FIELDS


def _size(value):
    return np.nan if value is None else value


class _Records:
    """The sink of ``json_syntax.check``: typed slices of the record arrays, turned
    into columns one slice at a time. The first error is kept (with the outline of
    the outer object before its array) and raised by ``columns`` once the whole
    syntax is known to be valid, so a syntax error anywhere still comes first."""

    def __init__(self, path, wide=False, totals=None, loose=False, vis_ratio=False):
        self.path, self.wide, self.loose, self.vis_ratio = path, wide, loose, vis_ratio
        self.types = dict(_RECORDS)
        self.loose_types = dict(unread_fields.LOOSE)
        if vis_ratio:
            self.types["annotations"] = list[_AnnotationWithVisRatio]
            self.loose_types["annotations"] = unread_fields.LOOSE_WITH_VIS_RATIO
        self.unread = dict.fromkeys(unread_fields.COUNTS, 0)
        self.bad_rows = {}  # annotation row -> (field, message): raised if it is scored
        self.totals = totals or {}  # records per array, from a syntax-only scan
        self.filled = dict.fromkeys(_RECORDS)  # preallocated array columns per key
        self.parts = {key: [] for key in _RECORDS}
        self.count = dict.fromkeys(_RECORDS, 0)
        self.error = None  # (exception, absolute offset of its slice, outline)
        self.out_of_range = {}  # (key, field) -> first InputError

    def __call__(self, key, records, *, first, piece_at, prefix):
        if self.error is not None or key not in _RECORDS:
            return False
        if first:  # a repeated key replaces the earlier array, as in a whole decode
            self.parts[key], self.count[key], self.filled[key] = [], 0, None
            if key == "annotations":
                self.bad_rows = {}
            for field_key in [k for k in self.out_of_range if k[0] == key]:
                del self.out_of_range[field_key]
        try:
            try:
                decoded = json_literals.decode(records, self.types[key])
            except msgspec.ValidationError as e:
                if not (self.loose and unread_fields.loose_field(key, str(e))):
                    raise
                loose = json_literals.decode(records, self.loose_types[key])
                decoded = unread_fields.normalise(
                    key, loose, self.unread, base=self.count[key], bad=self.bad_rows
                )
        except (msgspec.ValidationError, msgspec.DecodeError) as e:
            self.error = (e, key, self.count[key], piece_at, prefix())
            self.parts = None  # no more columns: the file is rejected
            return False
        self._keep(key, getattr(self, key)(decoded, key, self.count[key]), len(decoded))
        self.count[key] += len(decoded)
        return True

    def _keep(self, key, part, n):
        """Keep a slice's columns: its arrays written in place into columns of the
        array's full length when a syntax-only scan counted its records (so a valid
        split peaks at about one copy of its columns, not two while joining), else
        kept as a part to join at the end. A slice that does not fit (other counts,
        ids beyond 64 bits) turns the key back to parts."""
        start, total = self.count[key], self.totals.get(key)
        arrays = [name for name, value in part.items() if isinstance(value, np.ndarray)]
        if start == 0 and total is not None and self.filled[key] is None:
            self.filled[key] = {
                name: np.empty((total, *part[name].shape[1:]), part[name].dtype) for name in arrays
            }
        filled = self.filled[key]
        if filled is not None:
            if start + n <= total and all(part[a].dtype == filled[a].dtype for a in arrays):
                for name in arrays:
                    filled[name][start : start + n] = part.pop(name)
                part["_range"] = (start, start + n)
            else:
                for earlier in self.parts[key]:
                    a, b = earlier.pop("_range")
                    earlier.update({name: filled[name][a:b] for name in arrays})
                self.filled[key] = None
        self.parts[key].append(part)

    def ids(self, values, key, field, base):
        try:
            locate = lambda i: f"{key}[{base + i}]"  # noqa: E731
            values = whole_ids(self.path, values, locate, field)
            return int_column(self.path, values, locate, field, self.wide)
        except InputError as e:
            self.out_of_range.setdefault((key, field), e)
            return np.zeros(len(values), np.int64)

    def images(self, images, key, base):
        return {
            "image_ids": self.ids([im.id for im in images], key, "id", base),
            "image_width": np.array([_size(im.width) for im in images], np.float64),
            "image_height": np.array([_size(im.height) for im in images], np.float64),
            "image_tags": [tuple(escaped(t) for t in im.tags) for im in images],
        }

    def categories(self, categories, key, base):
        return {
            "class_ids": self.ids([c.id for c in categories], key, "id", base),
            "class_names": [category_name(c) for c in categories],
        }

    def annotations(self, anns, key, base):
        def given(name):
            return np.array([_size(getattr(a, name)) for a in anns], np.float64)

        return {
            "box_ids": self.ids([a.id for a in anns], key, "id", base),
            "box_image_ids": self.ids([a.image_id for a in anns], key, "image_id", base),
            "box_class_ids": self.ids([a.category_id for a in anns], key, "category_id", base),
            "boxes": np.array([a.bbox for a in anns], np.float64).reshape(-1, 4),
            "box_area": given("area"),
            "box_area_given": np.array([a.area is not None for a in anns], bool),
            **self.crowd_columns([a.iscrowd for a in anns], base),
            "difficult": np.array([bool(a.difficult) for a in anns], bool),
            "ignore_key": np.array([bool(a.ignore) for a in anns], bool),
            "ignore_key_fraction": np.array(
                [a.ignore != 0 and -1 < a.ignore < 1 for a in anns], bool
            ),
            "occlusion": given("occlusion"),
            "truncation": given("truncation"),
            "visibility": given("visibility"),
            "vis_ratio": (given("vis_ratio") if self.vis_ratio else np.full(len(anns), np.nan)),
        }

    def crowd_columns(self, values, base):
        """``crowd`` and ``ignore`` from ``iscrowd`` values, as pycocotools 2.0.11 reads
        them: ``_prepare`` ignores a box whose ``iscrowd`` is truthy (0.5 too), while
        ``evaluateImg`` passes ``int(iscrowd)`` to ``maskUtils.iou`` as uint8, so a
        value whose integer part is nonzero (1..255: ``true``, 2, 1.5) is a crowd region
        (crowd IoU, reusable); 0 < |iscrowd| < 1 makes an ignored regular box. Any other
        number is read the same way, as truthiness: nonzero integer part = crowd. An
        integer part outside 0..255 (300, -1, or infinite) passes ``_prepare`` and makes
        pycocotools raise only in ``computeIoU`` (the uint8 cast) when a detection of
        its class meets the box on its image; here it is always a crowd region, and
        ``crowd_wide`` marks it (counted as ``iscrowd_outside_0_255``)."""
        try:
            v = np.array(values, np.float64).reshape(-1)
        except OverflowError:  # an integer beyond float64: infinite, a crowd region
            v = np.array([_as_float(x) for x in values], np.float64)
        whole = np.trunc(v)
        crowd = whole != 0  # NaN and infinities are truthy too
        wide = ~np.isfinite(v) | (whole < 0) | (whole > 255)
        return {"crowd": crowd, "ignore": (v != 0) & ~crowd, "crowd_wide": wide}

    def dont_care(self, regions, key, base):
        return {
            "region_image_ids": self.ids([r.image_id for r in regions], key, "image_id", base),
            "regions": np.array([r.bbox for r in regions], np.float64).reshape(-1, 4),
        }

    def columns(self, checker):
        """The columns of a syntactically valid file, or its first error."""
        if self.error is not None:
            error, key, base, piece_at, outline = self.error
            self._check_outline(checker, outline + b"[]}", _Outline)
            if isinstance(error, msgspec.ValidationError):
                raise validation_error(
                    self.path, error, top_level_list=False, base=base, key=key
                ) from None
            raise _slice_decode_error(self.path, error, checker, lambda k: piece_at + k) from None
        self._check_outline(checker, bytes(checker.skeleton), _Dataset)
        for field_key in _VALUE_FIELDS:
            if field_key in self.out_of_range:
                raise self.out_of_range[field_key]
        empty = {
            "images": self.images([], "images", 0),
            "categories": self.categories([], "categories", 0),
            "annotations": self.annotations([], "annotations", 0),
            "dont_care": self.dont_care([], "dont_care", 0),
        }
        cols = {}
        for key, parts in self.parts.items():
            filled = self.filled[key]
            for name, column in empty[key].items():
                if filled is not None and name in filled:
                    cols[name] = filled[name][: self.count[key]]
                    continue
                pieces = [part.pop(name) for part in parts]  # freed column by column
                if isinstance(column, list):
                    cols[name] = [item for piece in pieces for item in piece]
                else:
                    cols[name] = np.concatenate([column, *pieces])
                del pieces
        cols["unread_counts"] = dict(self.unread)
        cols["bad_rows"] = dict(self.bad_rows)
        return cols

    def _check_outline(self, checker, outline, kind):
        """Raise the type (or encoding) error of the outer object with its arrays
        emptied: a missing array, or one given as something else (a ``dont_care`` that
        is not an array is left unread when ``loose``)."""
        try:
            try:
                json_literals.decode(outline, kind)
            except msgspec.ValidationError as e:
                if not (self.loose and str(e).endswith("`$.dont_care`")):
                    raise
                json_literals.decode(outline, _LOOSE_OUTLINES[kind])
                self.unread["unread_dont_care"] += 1
        except msgspec.ValidationError as e:
            if str(e).startswith("Expected `object`, got `array`"):
                raise _array_given(self.path) from None
            raise validation_error(self.path, e, top_level_list=False) from None
        except msgspec.DecodeError as e:
            raise _slice_decode_error(self.path, e, checker, checker.file_offset) from None


def _slice_decode_error(path, error, checker, locate):
    """A decoding error the syntax check lets through (invalid UTF-8 in a string, a
    number out of range), at its line and column as a whole-file decode gives them;
    ``locate`` maps a byte of the decoded text to its offset in the file."""
    text = str(error)
    m = re.search(r"\(byte (\d+)\)", text)
    if "truncated" in text:
        return InputError(path, "the JSON ends early: the file looks truncated")
    if not m:
        return InputError(path, f"not valid JSON: {text}")
    line, column = checker.line_column(locate(int(m.group(1))))
    reason = text.split(":", 1)[-1].split("(byte")[0].strip()
    return InputError(path, f"not valid JSON: {reason} at line {line}, column {column}")


def _columns(records, path="", base=0, wide=False):
    n = len(records)

    def locate(i):
        return f"record {base + i}"

    def ids(values, field):
        values = whole_ids(path, values, locate, field)
        if set(map(type, values)) <= _INT_ONLY:
            try:
                return np.fromiter(values, np.int64, n)
            except OverflowError:  # beyond int64: see int_column
                pass
        return int_column(path, values, locate, field, wide)

    # Fields read with C-level getters (no Python frame per record); each bbox is a
    # 4-tuple of floats (the struct's type), laid out row after row.
    return (
        ids(list(map(_IMAGE_ID, records)), "image_id"),
        ids(list(map(_CATEGORY_ID, records)), "category_id"),
        np.fromiter(chain.from_iterable(map(_BBOX, records)), np.float64, 4 * n).reshape(-1, 4),
        np.fromiter(map(_SCORE, records), np.float64, n),
    )


_IMAGE_ID, _CATEGORY_ID = attrgetter("image_id"), attrgetter("category_id")
_BBOX, _SCORE = attrgetter("bbox"), attrgetter("score")


class _Position:
    """Line and column of absolute byte offsets, for bytes already read and dropped."""

    def __init__(self, offset):
        self.offset = offset  # absolute offset of buf[0]
        self.lines = 0  # newlines before it
        self.line_start = 0  # absolute offset just after the last of them

    def advance(self, consumed, end=None):
        """Move past ``consumed`` (its first ``end`` bytes: no copy of a slice)."""
        end = len(consumed) if end is None else end
        newlines = consumed.count(b"\n", 0, end)
        if newlines:
            self.lines += newlines
            self.line_start = self.offset + consumed.rfind(b"\n", 0, end) + 1
        self.offset += end

    def locate(self, buf, k):
        """(line, column) of buf[k], 1-based."""
        nl = buf.rfind(b"\n", 0, k)
        line = self.lines + buf.count(b"\n", 0, k) + 1
        column = k - nl if nl >= 0 else self.offset + k - self.line_start + 1
        return line, column


def _last_cut(buf, lowest):
    """(end of a record's ``}``, position after the comma that follows it), the last
    such pair at or after ``lowest``; None if there is none yet."""
    brace = len(buf)
    while True:
        brace = buf.rfind(b"}", lowest, brace)
        if brace < 0:
            return None
        after = brace + 1
        while after < len(buf) and buf[after : after + 1].isspace():
            after += 1
        if buf[after : after + 1] == b",":
            return brace + 1, after + 1


def _piece_error(path, error, buf, where, shift):
    """An InputError for a slice of ``buf`` (decoded with ``shift`` bytes in front of
    it) that failed at its byte ``k + shift``."""
    text = str(error)
    if "truncated" in text:
        return InputError(path, "the JSON ends early: the file looks truncated")
    m = re.search(r"\(byte (\d+)\)", text)
    if not m:
        return InputError(path, f"not valid JSON: {text}")
    line, column = where.locate(buf, max(int(m.group(1)) - shift, 0))
    reason = text.split(":", 1)[-1].split("(byte")[0].strip()
    return InputError(path, f"not valid JSON: {reason} at line {line}, column {column}")


def _decode_slice(piece, path="", base=0, mode=mask_results.BOXES):
    """Typed detections of a slice; one whose typed decode fails on a ``bbox`` or
    ``score`` is decoded again loosely (``unread_fields.normalise_detections``).
    Under ``mask_results.MASKS`` (the file's first result has a segmentation and no
    box) the records of ``mask_results.decode``; under the other readings of
    ``result_readings`` those of its ``decode``."""
    if mode == mask_results.MASKS:
        return mask_results.decode(piece, path, base)
    if mode in result_readings.MODES:
        return result_readings.decode(piece, path, base, mode)
    try:
        return json_literals.decode(piece, list[_Detection])
    except msgspec.ValidationError as e:
        if not unread_fields.loose_detection(str(e)):
            raise
        loose = json_literals.decode(piece, list[unread_fields.LooseDetection])
        return unread_fields.normalise_detections(path, loose, base)


def _stream(path, f, skip, build=True, wide=False, decode=None):
    """Columns of the records of a top-level JSON array, read a few MB at a time
    (with ``build=False`` only the record counts: a validation pass; ``decode``: how a
    slice becomes records: ``_decode_slice`` unless given, as ``exact_scores``' loose one).

    Memory stays bounded by the slice size whatever the file size, also when the
    file turns out to be malformed or truncated: nothing is ever read whole. A slice
    ends after a ``}`` followed by a comma; should that ``}`` sit inside a string or
    a nested object, the slice fails right at its end, and it is simply extended.
    """
    decode = decode or _decode_slice
    where = _Position(skip)
    buf = f.read(CHUNK_BYTES)
    while buf and not buf.strip():  # leading whitespace
        where.advance(buf)
        buf = f.read(CHUNK_BYTES)
    if not buf:
        raise InputError(path, "the file is empty")
    lead = len(buf) - len(buf.lstrip())
    first = buf[lead : lead + 1]
    if first == b"{":
        raise InputError(
            path,
            "expected a JSON array of detections, got an object (is this a ground-truth file?)",
        )
    if first != b"[":
        try:
            json_literals.check_syntax(buf[lead:])
        except msgspec.DecodeError as e:
            where.advance(buf[:lead])
            raise _piece_error(path, e, buf[lead:], where, 0) from None
        raise InputError(path, "expected a JSON array of detections")
    # buf[0] is always "[": the array's own bracket, later the comma before the next
    # record, overwritten. A slice is decoded in place: the byte after its last "}" is
    # set to "]" for the call and restored, so no slice is ever copied.
    where.advance(buf[:lead])
    buf = bytearray(buf[lead:])
    base, lowest, eof, mode = 0, 1, False, None
    while True:
        if mode is None:
            mode = _first_mode(path, buf, where, eof)
            if mode is None:  # the first record is not whole yet: take more
                more = f.read(CHUNK_BYTES)
                eof = not more
                buf += more
                continue
        if eof:
            end = len(buf)  # the rest, closing bracket included
        else:
            cut = _last_cut(buf, lowest)
            if cut is None:
                if len(buf) > CHUNK_BYTES:  # no record ends here: a real error is reported
                    _check_prefix(path, buf, where, base, mode)
                more = f.read(CHUNK_BYTES)
                eof = not more
                buf += more
                continue
            end = cut[0] + 1
            saved, buf[cut[0]] = buf[cut[0]], 0x5D  # "]"
        view = memoryview(buf)[:end]
        try:
            records = decode(view, path, base, mode)
        except msgspec.ValidationError as e:
            raise validation_error(path, e, top_level_list=True, base=base) from None
        except msgspec.DecodeError as e:
            m = re.search(r"\(byte (\d+)\)", str(e))
            at_end = "truncated" in str(e) or (m and int(m.group(1)) >= end - 1)
            if not eof and at_end:  # maybe a cut inside a string: take more
                view.release()
                buf[cut[0]] = saved
                lowest = len(buf)
                more = f.read(CHUNK_BYTES)
                eof = not more
                buf += more
                continue
            view.release()
            if not eof:
                buf[cut[0]] = saved
            raise _piece_error(path, e, buf, where, 0) from None
        finally:
            view.release()
        yield _block(records, path, base, wide, mode, build)
        if eof:
            return
        base += len(records)
        comma = cut[1] - 1
        where.advance(buf, comma)
        del buf[:comma]
        buf[0] = 0x5B  # "["
        lowest = 1
        more = f.read(CHUNK_BYTES)
        eof = not more
        buf += more


def _first_mode(path, buf, where, eof):
    """The reading (``mask_results.mode``) of the file's first record, decided only
    once that record is whole in ``buf`` (its end found at nesting depth 1, so however
    the bytes were chunked); None while it is not and more can be read. A first
    record that does not decode is read as boxes, whose decoding reports its error."""
    end = json_syntax.first_record_end(buf)
    if end is None and not eof:
        if len(buf) > CHUNK_BYTES:  # a syntax error inside it is reported now
            try:
                json_literals.check_syntax(bytes(buf))
            except msgspec.DecodeError as e:
                if not _cut_short(e, len(buf)):
                    raise _piece_error(path, e, buf, where, 0) from None
            if len(buf) > MAX_SLICE_BYTES:
                raise InputError(
                    path,
                    f"no record ends within {MAX_SLICE_BYTES >> 20} MB: not a detections file",
                    record="record 0",
                )
        return None
    first = bytes(buf) if end is None else bytes(buf[:end]) + b"]"
    return mask_results.mode(first) or mask_results.BOXES


def _block(records, path, base, wide, mode, build):
    """A slice's columns (image ids, class ids, boxes, scores, areas: None when the
    file is read as boxes, and the reading: ``mask_results.mode``), or with
    ``build=False`` its record count (a mask-reading slice is still checked whole)."""
    if mode in result_readings.MODES:
        if not build:
            return len(records)
        return (*_columns(records, path, base, wide), result_readings.area(records), mode)
    if mode != mask_results.MASKS:
        return (*_columns(records, path, base, wide), None, None) if build else len(records)
    boxes, area = mask_results.columns(records, path, base)
    if not build:
        return len(records)
    for record, box in zip(records, boxes.tolist()):
        record.bbox = box
    return (*_columns(records, path, base, wide), area, mode)


def _cut_short(error, n):
    """Whether msgspec's error on ``n`` bytes is only their ending early: truncated,
    or failing at the last byte or just past it (a number cut as ``0.`` or ``1e``)."""
    m = re.search(r"\(byte (\d+)\)", str(error))
    return "truncated" in str(error) or bool(m and int(m.group(1)) >= n - 1)


def _check_prefix(path, buf, where, base, mode):
    """Raise the decoding error of buf (which starts with "[") unless it only ends
    early; give up past ``MAX_SLICE_BYTES`` without a record boundary."""
    try:
        _decode_slice(bytes(buf), path, base, mode)
    except msgspec.ValidationError as e:
        raise validation_error(path, e, top_level_list=True, base=base) from None
    except msgspec.DecodeError as e:
        if not _cut_short(e, len(buf)):
            raise _piece_error(path, e, buf, where, 0) from None
    if len(buf) > MAX_SLICE_BYTES:
        raise InputError(
            path,
            f"no record ends within {MAX_SLICE_BYTES >> 20} MB: not a detections file",
            record=f"record {base}",
        )


def _ends_like_an_array(f):
    size = f.seek(0, 2)
    f.seek(max(size - 4096, 0))
    return f.read().rstrip().endswith(b"]")


def read_detections(path, wide=False):
    """Decode a COCO-style results file: image ids, category ids, xywh boxes, scores
    (ids beyond signed 64 bits: see ``int_column``)."""
    with open(path, "rb") as f:
        skip = text_start(path, f.read(4))
        if f.seek(0, 2) - skip > VALIDATE_FIRST_BYTES or not _ends_like_an_array(f):
            # Large, malformed or truncated: find the first error without keeping any
            # columns, so rejecting a huge broken file needs no memory in proportion
            # to it; the records counted let the columns be allocated once.
            f.seek(skip)
            total = sum(_stream(path, f, skip, build=False))
            f.seek(skip)
            return _filled(_stream(path, f, skip, wide=wide), total)
        f.seek(skip)
        parts = list(_stream(path, f, skip, wide=wide))
    if not parts:
        return empty_columns()
    return tuple(_joined(column) for column in zip(*parts))


def _joined(column):
    """One column of the blocks joined (the reading: the first block's)."""
    if column[0] is None or isinstance(column[0], str):
        return column[0]
    return np.concatenate(column)


def detection_blocks(path, wide=False, decode=None):
    """The columns of ``read_detections`` a slice of the file at a time (a few MB),
    in file order: memory follows the slice, not the file."""
    with open(path, "rb") as f:
        skip = text_start(path, f.read(4))
        f.seek(skip)
        yield from _stream(path, f, skip, wide=wide, decode=decode)


def empty_columns():
    """The columns of a file without records."""
    return (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros((0, 4)), np.zeros(0), None, None)


def _filled(parts, total):
    """The columns of ``parts`` written into arrays of their known full length (no
    second copy while joining); an id column turns to objects for ids beyond int64."""
    columns, at = None, 0
    for part in parts:
        if columns is None:
            columns = [
                p if p is None or isinstance(p, str) else np.empty((total, *p.shape[1:]), p.dtype)
                for p in part
            ]
        n = len(part[0])
        for i, values in enumerate(part):
            if values is None or isinstance(values, str):
                continue
            if values.dtype != columns[i].dtype:
                columns[i] = columns[i].astype(object)
            columns[i][at : at + n] = values
        at += n
    if columns is None:
        return empty_columns()
    return tuple(c if c is None or isinstance(c, str) else c[:at] for c in columns)
