"""The ground-truth loader decodes the record arrays slice by slice (``read_truth``
with ``json_syntax.check``'s sink) and must give what a whole-document typed decode by
msgspec gives: the same columns on valid files, and on files with a type error (a
wrong type anywhere, a missing field or array, an id beyond 64 bits, a number out of
range, invalid UTF-8, a repeated key) the same message naming record and field.
Slices of 16 and 64 bytes make every cut land everywhere. Read with the ``vis_ratio``
key (``vis_ratio=True``), as given (``"as-given"``: numbers and booleans, null
refused) and without (then the key is skipped like any unknown key, whatever it holds,
and the column is all NaN). An annotation's ``height`` key is read as given under
``"as-given"`` alone (numbers and booleans; null, text, arrays and objects kept for
``miss-rate-cityscale``'s refusal, never refused on reading) and skipped otherwise."""

import json
import random

import msgspec
import numpy as np
import pytest

from evaluation.engine import InputError
from evaluation.engine.loaders import (
    annotation_flags,
    coco_json,
    coco_records,
    coco_truth,
    json_literals,
    json_syntax,
)
from evaluation.engine.loaders.ids import escaped, id_kinds

from . import whole_file


class _DatasetWithVisRatio(msgspec.Struct):
    images: list[coco_records._Image]
    categories: list[coco_records._Category]
    annotations: list[coco_records._AnnotationWithVisRatio] = []
    dont_care: list[coco_records._Region] = []


class _DatasetVisRatioAsGiven(_DatasetWithVisRatio):
    annotations: list[coco_records._AnnotationVisRatioAsGiven] = []


def _as_given(values):
    kind = [0 if v is msgspec.UNSET else 2 if type(v) is bool else 1 for v in values]
    numbers = [np.nan if k == 0 else float(v) for k, v in zip(kind, values)]
    return {
        "vis_ratio": np.array(numbers, np.float64),
        "vis_ratio_kind": np.array(kind, np.int8),
    }


def _heights(anns, as_given):
    """The ``height`` key as the city-scale script compares it (``vis_ratio="as-given"``
    only, else skipped): a number or boolean given (an integer beyond float64 +-inf, as
    it compares with the setups' finite bounds); absent, null, text, arrays and objects
    not given, the last four kept for ``cityscale_raises`` (``city_rows``)."""
    values = [getattr(a, "height", msgspec.UNSET) if as_given else msgspec.UNSET for a in anns]
    given = [type(v) in (int, float, bool) for v in values]
    numbers = []
    for v, g in zip(values, given):
        try:
            numbers.append(float(v) if g else np.nan)
        except OverflowError:
            numbers.append(np.inf if v > 0 else -np.inf)
    faults = [
        i
        for i, v in enumerate(values)
        if v is not msgspec.UNSET and type(v) not in (int, float, bool)
    ]
    columns = {
        "height_key": np.array(numbers, np.float64),
        "height_given": np.array(given, bool),
    }
    return columns, faults


def _whole(path, data, vis_ratio=False):
    """The reference: one msgspec decode of the whole document, then the columns;
    NaN/Infinity and out-of-range numbers (1e999) read as Python's json reads them
    (``json_literals.decode`` on the whole document)."""
    try:
        kind = {False: coco_records._Dataset, True: _DatasetWithVisRatio}.get(
            vis_ratio, _DatasetVisRatioAsGiven
        )
        d = json_literals.decode(data, kind)
    except msgspec.ValidationError as e:
        return str(coco_json.validation_error(path, e, top_level_list=False))
    except msgspec.DecodeError as e:
        return str(whole_file.decode_error(path, e, data))
    whole = {}
    for key, field in coco_truth._ID_FIELDS:
        values = [getattr(r, field) for r in getattr(d, key)]
        try:
            locate = lambda i, key=key: f"{key}[{i}]"  # noqa: E731
            whole[key, field] = coco_json.whole_ids(path, values, locate, field)
            coco_json.int_column(path, whole[key, field], locate, field)
        except InputError as e:
            return str(e)
    anns = d.annotations
    sink = coco_truth._Records(path)
    crowd = annotation_flags.crowd_columns([a.iscrowd for a in anns])
    if sink.out_of_range:
        return str(sink.out_of_range["annotations", "iscrowd"])

    def opt(values):
        return np.array([np.nan if v is None else v for v in values], np.float64)

    heights, faults = _heights(anns, vis_ratio == "as-given")
    return {
        **heights,
        "height_faults": faults,
        "image_ids": np.array(whole["images", "id"], np.int64),
        "image_id_kinds": id_kinds([im.id for im in d.images]),
        "class_id_kinds": id_kinds([c.id for c in d.categories]),
        "image_width": opt(im.width for im in d.images),
        "image_height": opt(im.height for im in d.images),
        # shown with a lone surrogate as its escape (``ids.escaped``)
        "image_tags": [tuple(escaped(t) for t in im.tags) for im in d.images],
        "class_ids": np.array(whole["categories", "id"], np.int64),
        "class_names": [coco_json.category_name(c) for c in d.categories],
        "box_ids": np.array(whole["annotations", "id"], np.int64),
        "box_image_ids": np.array(whole["annotations", "image_id"], np.int64),
        "box_class_ids": np.array(whole["annotations", "category_id"], np.int64),
        "box_class_id_kinds": id_kinds([a.category_id for a in anns]),
        "boxes": np.array([a.bbox for a in anns], np.float64).reshape(-1, 4),
        "box_area": opt(a.area for a in anns),
        "box_area_given": np.array([a.area is not None for a in anns], bool),
        **crowd,
        "difficult": np.array([bool(a.difficult) for a in anns], bool),
        "ignore_key": np.array([bool(a.ignore) for a in anns], bool),
        "ignore_key_fraction": np.array([a.ignore != 0 and -1 < a.ignore < 1 for a in anns], bool),
        "occlusion": opt(a.occlusion for a in anns),
        "truncation": opt(a.truncation for a in anns),
        "visibility": opt(a.visibility for a in anns),
        "vis_ratio": opt(a.vis_ratio for a in anns)
        if vis_ratio is True
        else np.full(len(anns), np.nan),
        "vis_ratio_kind": np.zeros(len(anns), np.int8),
        **(_as_given([a.vis_ratio for a in anns]) if vis_ratio == "as-given" else {}),
        "region_image_ids": np.array(whole["dont_care", "image_id"], np.int64),
        "regions": np.array([r.bbox for r in d.dont_care], np.float64).reshape(-1, 4),
    }


def _sliced(path, vis_ratio=False):
    try:
        cols = coco_json.read_truth(
            path, vis_ratio=vis_ratio
        )  # typed throughout: nothing is left unread
    except InputError as e:
        return str(e)
    assert not any(cols.pop("unread_counts").values()) and not cols.pop("bad_rows")
    city = cols.pop("city_rows")
    assert all(set(fields) == {"height"} for fields in city.values()), city
    cols["height_faults"] = sorted(city)
    return cols


BAD_VALUES = ['"x"', "null", "2.5", "[]", "{}", str(2**70), "-" + str(2**63 + 1), "1e999", '"\xff"']
BAD_VALUES += ["NaN", "Infinity", "-Infinity"]  # Python's json literals
BAD_VALUES += ['"\\udc00"']  # a lone surrogate escape: read by Python's json


def _document(rng):
    """JSON text of a random split, then (usually) one type-level damage. Lone surrogate
    escapes in strings (read as Python's json reads them) unless a value or an array is
    damaged: then the whole document, holding one, is read by ``json.loads``, whose
    Python int beyond 64 bits msgspec's message calls 'int' where its own decoding says
    'float', and whose repeated key is its last where msgspec checks each."""
    damage = rng.choice(["none", "value", "field", "array", "missing", "repeat"])
    lone = "" if damage in ("value", "array") else "\udc00"
    doc = {
        "info": {"note": 'a\\"b,]' + lone, "n": [1, {"images": None}]},
        "images": [
            {"id": i, "width": 640, "height": 480, "tags": ["x,]", 'y"', "\\ud800" + lone]}
            for i in range(rng.randint(0, 6))
        ],
        "annotations": [
            {
                "id": i,
                "image_id": rng.randint(0, 5),
                "category_id": 1,
                "bbox": [1.5, 2, 3e2, 4],
                "area": rng.choice([None, 12.5]),
                "iscrowd": rng.choice([0, 1, True]),
                "segmentation": [[1, 2, 3, 4]],
                "occlusion": rng.choice([None, 1]),
                "vis_ratio": rng.choice([None, 0.4, 1]),
                # the city-scale script's key: read as given under "as-given" only
                "height": rng.choice([4, 40.5, True, 2**70, None, "4"]),
            }
            for i in range(rng.randint(0, 10))
        ],
        "categories": [{"id": 1, "name": "car"}, {"id": 2, "name": "pedestrian"}],
        "dont_care": [{"image_id": 0, "bbox": [0, 0, 5, 5]}] * rng.randint(0, 2),
    }
    keys = list(doc)
    rng.shuffle(keys)
    if damage == "missing":
        keys.remove(rng.choice(["images", "annotations", "categories"]))
    if damage in ("value", "field"):
        records = [
            (k, r) for k in ("images", "annotations", "categories", "dont_care") for r in doc[k]
        ]
        if records:
            key, record = rng.choice(records)
            record = doc[key][doc[key].index(record)] = dict(record)
            field = rng.choice(list(record))
            if damage == "field":
                del record[field]
            else:
                record[field] = "@@BAD@@"
    parts = [f"{json.dumps(k)}: {json.dumps(doc[k], indent=rng.choice([None, 1]))}" for k in keys]
    if damage == "array":
        at = rng.randrange(len(parts) + 1)
        key = rng.choice(["images", "annotations", "categories"])
        value = rng.choice(["5", "{}", '{"a": [1]}', "null"])
        parts.insert(at, f'"{key}": {value}')
    if damage == "repeat":
        key = rng.choice(["images", "annotations", "categories"])
        parts.append(f'"{key}": {json.dumps(doc[key][:1])}')
    text = "{" + ", ".join(parts) + "}"
    return text.replace('"@@BAD@@"', rng.choice(BAD_VALUES))


@pytest.mark.parametrize("vis_ratio", [False, True, "as-given"])
@pytest.mark.parametrize("scan_first", [False, True])
@pytest.mark.parametrize("chunk", [16, 64])
@pytest.mark.parametrize("seed", range(4))
def test_sliced_decoding_agrees_with_a_whole_document_decode(
    files, monkeypatch, seed, chunk, scan_first, vis_ratio
):
    """``scan_first``: every file gets the syntax-only scan first, whose record counts
    let the columns be allocated at full length and filled in place."""
    monkeypatch.setattr(json_syntax, "CHUNK_BYTES", chunk)
    if scan_first:
        monkeypatch.setattr(coco_truth, "SYNTAX_FIRST_BYTES", 0)
    rng = random.Random(seed)
    outcomes = set()
    for n in range(150):
        data = _document(rng).encode("utf-8", "surrogateescape")
        data = data.replace("\xff".encode(), b"\xff")  # invalid UTF-8 inside a string
        if vis_ratio == "as-given":  # a null is refused there: a boolean read instead
            data = data.replace(b'"vis_ratio": null', b'"vis_ratio": true')
        path = files.write(f"split{n}.json", "")
        with open(path, "wb") as f:
            f.write(data)
        got = _sliced(path, vis_ratio)
        try:
            data.decode("utf-8")  # as pycocotools' text-mode open: strict UTF-8
        except UnicodeDecodeError as e:  # refused before any syntax (json_bytes)
            line = data.count(b"\n", 0, e.start) + 1
            column = e.start - data.rfind(b"\n", 0, e.start)
            assert f"not UTF-8 text: byte 0xff at line {line}, column {column} " in got
            outcomes.add("not-utf8")
            continue
        expected = _whole(path, data, vis_ratio)
        if isinstance(expected, str):
            assert got == expected, data
            outcomes.add(expected.split(":")[1].split(" ")[1])
            continue
        assert isinstance(got, dict), (got, data)
        assert sorted(got) == sorted(expected)
        for name, column in expected.items():
            if isinstance(column, list):
                assert got[name] == column, name
            else:
                assert got[name].dtype == column.dtype, name
                np.testing.assert_array_equal(got[name], column, err_msg=name)
        outcomes.add("valid")
    assert len(outcomes) >= 4, outcomes
