"""COCO-style JSON: ground truth (images / annotations / categories) and detections.

Decoding is typed (msgspec structs): unknown fields such as segmentation polygons are
skipped without building Python objects. A detections file is decoded in slices of a
few megabytes, each turned into arrays at once, so a file of millions of detections
never exists as Python objects all together.
"""

import mmap
import re

import msgspec
import numpy as np

from ..errors import InputError

CHUNK_BYTES = 4 << 20


class _Image(msgspec.Struct, gc=False):
    id: int
    width: float
    height: float
    tags: list[str] = []


class _Annotation(msgspec.Struct, gc=False):
    id: int
    image_id: int
    category_id: int
    bbox: tuple[float, float, float, float]
    area: float | None = None
    iscrowd: int | bool = 0
    difficult: int | bool = 0


class _Category(msgspec.Struct, gc=False):
    id: int
    name: str


class _Dataset(msgspec.Struct, gc=False):
    images: list[_Image]
    annotations: list[_Annotation]
    categories: list[_Category]


class _Detection(msgspec.Struct, gc=False):
    image_id: int
    category_id: int
    bbox: tuple[float, float, float, float]
    score: float


_PATH = re.compile(r"^(?P<msg>.*) - at `\$(?P<path>.*)`$")
_INDEX = re.compile(r"^(?P<key>\.\w+)?\[(?P<i>\d+)\](?P<rest>.*)$")


def _friendly(message):
    message = message.replace("`", "'")
    return message[:1].lower() + message[1:]


def validation_error(path, error, *, top_level_list, base=0):
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
        key = (idx["key"] or "").lstrip(".")
        record = f"record {i}" if top_level_list else f"{key}[{i}]"
        field = idx["rest"].lstrip(".")
    if field_match:
        message, field = "missing required field", field_match["f"]
    return InputError(path, message, record=record, field=field)


def decode_error(path, error, data, base_offset=0):
    text = str(error)
    m = re.search(r"\(byte (\d+)\)", text)
    if "truncated" in text:
        return InputError(path, "the JSON ends early: the file looks truncated")
    if not m:
        return InputError(path, f"not valid JSON: {text}")
    offset = int(m.group(1)) + base_offset
    line = data.count(b"\n", 0, offset) + 1
    column = offset - (data.rfind(b"\n", 0, offset) + 1) + 1
    reason = text.split(":", 1)[-1].split("(byte")[0].strip()
    return InputError(path, f"not valid JSON: {reason} at line {line}, column {column}")


def read_truth(path):
    """Decode a COCO-style ground-truth file into plain columns."""
    with open(path, "rb") as f:
        data = f.read()
    if not data.strip():
        raise InputError(path, "the file is empty")
    try:
        dataset = msgspec.json.decode(data, type=_Dataset)
    except msgspec.ValidationError as e:
        if str(e).startswith("Expected `object`, got `array`"):
            raise InputError(
                path,
                "expected a ground-truth object with images, annotations and "
                "categories, got a JSON array (is this a predictions file?)",
            ) from None
        raise validation_error(path, e, top_level_list=False) from None
    except msgspec.DecodeError as e:
        raise decode_error(path, e, data) from None
    anns = dataset.annotations
    return {
        "image_ids": np.array([im.id for im in dataset.images], np.int64),
        "image_width": np.array([im.width for im in dataset.images], np.float64),
        "image_height": np.array([im.height for im in dataset.images], np.float64),
        "image_tags": [tuple(im.tags) for im in dataset.images],
        "class_ids": np.array([c.id for c in dataset.categories], np.int64),
        "class_names": [c.name for c in dataset.categories],
        "box_ids": np.array([a.id for a in anns], np.int64),
        "box_image_ids": np.array([a.image_id for a in anns], np.int64),
        "box_class_ids": np.array([a.category_id for a in anns], np.int64),
        "boxes": np.array([a.bbox for a in anns], np.float64).reshape(-1, 4),
        "box_area": np.array([np.nan if a.area is None else a.area for a in anns], np.float64),
        "crowd": np.array([bool(a.iscrowd) for a in anns], bool),
        "difficult": np.array([bool(a.difficult) for a in anns], bool),
        "ignore": np.zeros(len(anns), bool),
    }


def _columns(records):
    n = len(records)
    return (
        np.fromiter((r.image_id for r in records), np.int64, n),
        np.fromiter((r.category_id for r in records), np.int64, n),
        np.array([r.bbox for r in records], np.float64).reshape(-1, 4),
        np.fromiter((r.score for r in records), np.float64, n),
    )


def _slices(data, path):
    """Byte ranges of the records of a top-level JSON array, a few MB at a time.

    A cut is placed after a ``}`` followed by a comma. Should that ``}`` sit inside
    a string, the slice fails to decode and the caller decodes the whole file,
    which then gives the exact error or the right records.
    """
    start = 0
    n = len(data)
    while start < n and data[start : start + 1].isspace():
        start += 1
    end = n
    while end > start and data[end - 1 : end].isspace():
        end -= 1
    if start >= end:
        raise InputError(path, "the file is empty")
    if data[start : start + 1] != b"[" or data[end - 1 : end] != b"]":
        yield None
        return
    pos, stop = start + 1, end - 1
    while pos < stop:
        cut = pos + CHUNK_BYTES
        if cut >= stop:
            yield pos, stop
            return
        brace = data.find(b"}", cut, stop)
        while brace != -1:
            after = brace + 1
            while after < stop and data[after : after + 1].isspace():
                after += 1
            if data[after : after + 1] == b",":
                break
            brace = data.find(b"}", brace + 1, stop)
        if brace == -1:
            yield pos, stop
            return
        yield pos, brace + 1
        pos = after + 1


def _decode_whole(path, data):
    try:
        records = msgspec.json.decode(data, type=list[_Detection])
    except msgspec.ValidationError as e:
        if str(e).startswith("Expected `array`, got `object`"):
            raise InputError(
                path,
                "expected a JSON array of detections, got an object (is this a ground-truth file?)",
            ) from None
        raise validation_error(path, e, top_level_list=True) from None
    except msgspec.DecodeError as e:
        raise decode_error(path, e, data) from None
    return [_columns(records)]


def read_detections(path):
    """Decode a COCO-style results file: image ids, category ids, xywh boxes, scores."""
    with open(path, "rb") as f:
        if f.seek(0, 2) == 0:
            raise InputError(path, "the file is empty")
        f.seek(0)
        with mmap.mmap(f.fileno(), 0, access=mmap.ACCESS_READ) as data:
            parts = []
            for piece in _slices(data, path):
                if piece is None:
                    parts = _decode_whole(path, data[:])
                    break
                a, b = piece
                try:
                    records = msgspec.json.decode(b"[" + data[a:b] + b"]", type=list[_Detection])
                except (msgspec.ValidationError, msgspec.DecodeError):
                    parts = _decode_whole(path, data[:])
                    break
                parts.append(_columns(records))
    if not parts:
        return (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros((0, 4)), np.zeros(0))
    return tuple(np.concatenate(column) for column in zip(*parts))
