"""COCO-style ground truth (images / annotations / categories / dont_care): reading a
file into columns in bounded memory (``read_truth``), slice by slice of its record
arrays as ``json_syntax.check`` hands them on (``_Records``), with errors in the order
of a whole-file decode. An annotation's ``iscrowd``, ``ignore`` and ``id`` are read as
the reference codes read them by ``annotation_flags``.
"""

import math
import re

import msgspec
import numpy as np

from ..errors import InputError
from . import annotation_flags, json_literals, json_syntax, unread_fields
from .checks import text_start
from .coco_records import (
    _Annotation,
    _AnnotationVisRatioAsGiven,
    _AnnotationWithVisRatio,
    _Category,
    _Dataset,
    _Image,
    _Region,
    category_name,
    int_column,
    validation_error,
    whole_ids,
)
from .ids import escaped, id_kinds

#: A ground-truth file larger than this gets a syntax-only pass before the one that
#: builds columns (about 1 s more per 100 MB), so a syntax error late in it is found at
#: flat memory; below it, the columns built up to such an error are small anyway.
SYNTAX_FIRST_BYTES = 32 << 20


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
    ``vis_ratio`` (``True`` or ``"read"``) the annotations' ``vis_ratio`` key is read
    too (column ``vis_ratio``, NaN where absent; ``attributes.finish`` decides which key
    is the visibility); with ``"as-given"`` any number or boolean is read (booleans as
    0/1) and ``vis_ratio_kind`` tells absent (0), a number (1) and a boolean (2),
    and the ``height`` key is read as the city-scale script compares it (columns
    ``height_key``, ``height_given``: ``annotation_flags.height_columns``); without,
    both are skipped like any unknown key and the columns are all NaN (not given).
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
        self.path, self.wide, self.loose = path, wide, loose
        self.vis_ratio = bool(vis_ratio) and vis_ratio != "unread"
        self.types = dict(_RECORDS)
        self.loose_types = dict(unread_fields.LOOSE)
        self.as_given = vis_ratio == "as-given"
        if self.as_given:
            self.types["annotations"] = list[_AnnotationVisRatioAsGiven]
            self.loose_types["annotations"] = unread_fields.LOOSE_VIS_RATIO_AS_GIVEN
        elif vis_ratio and vis_ratio != "unread":
            self.types["annotations"] = list[_AnnotationWithVisRatio]
            self.loose_types["annotations"] = unread_fields.LOOSE_WITH_VIS_RATIO
        self.unread = dict.fromkeys(unread_fields.COUNTS, 0)
        self.bad_rows = {}  # annotation row -> (field, message): raised if it is scored
        self.city_rows = {}  # annotation row -> {field: (message, truthy)}: cityscale_raises
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
                self.bad_rows, self.city_rows = {}, {}
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
                    key,
                    loose,
                    self.unread,
                    base=self.count[key],
                    bad=self.bad_rows,
                    city=self.city_rows,
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
        raw = [im.id for im in images]
        return {
            "image_ids": self.ids(raw, key, "id", base),
            "image_id_kinds": id_kinds(raw),  # numpy tells true/1.0 from 1: unique_lost
            "image_width": np.array([_size(im.width) for im in images], np.float64),
            "image_height": np.array([_size(im.height) for im in images], np.float64),
            "image_tags": [tuple(escaped(t) for t in im.tags) for im in images],
        }

    def categories(self, categories, key, base):
        raw = [c.id for c in categories]
        return {
            "class_ids": self.ids(raw, key, "id", base),
            "class_id_kinds": id_kinds(raw),
            "class_names": [category_name(c) for c in categories],
        }

    def annotations(self, anns, key, base):
        def given(name):
            return np.array([_size(getattr(a, name)) for a in anns], np.float64)

        annotation_flags.city_faults(anns, base, self.city_rows)
        return {
            "box_ids": self.ids([a.id for a in anns], key, "id", base),
            "box_image_ids": self.ids([a.image_id for a in anns], key, "image_id", base),
            "box_class_ids": self.ids([a.category_id for a in anns], key, "category_id", base),
            # as written (true, 1.0): pycocotools' ``in catIds`` compares them so
            "box_class_id_kinds": id_kinds([a.category_id for a in anns]),
            "boxes": np.array([a.bbox for a in anns], np.float64).reshape(-1, 4),
            "box_area": given("area"),
            "box_area_given": np.array([a.area is not None for a in anns], bool),
            **annotation_flags.crowd_columns([a.iscrowd for a in anns]),
            "difficult": np.array([bool(a.difficult) for a in anns], bool),
            "ignore_key": np.array([bool(a.ignore) for a in anns], bool),
            "ignore_key_fraction": np.array(
                [a.ignore != 0 and -1 < a.ignore < 1 for a in anns], bool
            ),
            "occlusion": given("occlusion"),
            "truncation": given("truncation"),
            "visibility": given("visibility"),
            **self.vis_ratio_columns(anns, given),
            **self.height_columns(anns, base),
        }

    def height_columns(self, anns, base):
        """The ``height`` key (``annotation_flags.height_columns``), read as given
        with ``vis_ratio="as-given"`` only (else skipped like any unknown key)."""
        if self.as_given:
            return annotation_flags.height_columns(anns, base, self.city_rows)
        return {
            "height_key": np.full(len(anns), np.nan),
            "height_given": np.zeros(len(anns), bool),
        }

    def vis_ratio_columns(self, anns, given):
        if self.as_given:
            values = [a.vis_ratio for a in anns]
            kind = [0 if v is msgspec.UNSET else 2 if type(v) is bool else 1 for v in values]
            return {
                "vis_ratio": np.array(
                    [math.nan if k == 0 else float(v) for k, v in zip(kind, values)], np.float64
                ),
                "vis_ratio_kind": np.array(kind, np.int8),
            }
        return {
            "vis_ratio": given("vis_ratio") if self.vis_ratio else np.full(len(anns), np.nan),
            "vis_ratio_kind": np.zeros(len(anns), np.int8),
        }

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
        cols["city_rows"] = dict(self.city_rows)
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
    m = re.search(r"\(byte ([0-9]+)\)", text)
    if "truncated" in text:
        return InputError(path, "the JSON ends early: the file looks truncated")
    if not m:
        return InputError(path, f"not valid JSON: {text}")
    line, column = checker.line_column(locate(int(m.group(1))))
    reason = text.split(":", 1)[-1].split("(byte")[0].strip()
    return InputError(path, f"not valid JSON: {reason} at line {line}, column {column}")
