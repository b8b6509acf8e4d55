"""What Python's ``json`` refuses before reading any record, in strings and numbers the
engine never reads (``loaders/json_bytes.py``), in either file, whole and in slices, with
a cache:

* bytes that are not UTF-8 (a Latin-1 ``file_name``, a caption, an extra key):
  pycocotools 2.0.11 opens both files in text mode and ``json.load`` raises
  ``UnicodeDecodeError``; the UTF-8 rules are RFC 8259 section 8.1 / RFC 3629, checked
  here by Python's own strict decoder on the same bytes. Valid multi-byte text cut by
  any slice end is read as before.
* an integer of more than 4300 digits: Python's ``json`` raises ValueError ("Exceeds the
  limit (4300 digits) for integer string conversion"), so pycocotools refuses the file;
  a float with that many digits (``1.<5000>``, ``1<5000>e0``, ``1e<5000>``) or digits in
  a string is read by Python's json, and by us. Each shape is first checked against
  ``json.loads`` itself.
"""

import json
import os
import re

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from evaluation.engine import load_predictions, load_truth
from evaluation.engine.errors import InputError
from evaluation.engine.loaders import json_bytes, json_syntax, results_stream

_IMAGE = {"id": 1, "width": 100, "height": 100, "file_name": "cafe.jpg"}
_ANN = {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 30, 30], "area": 900.0,
        "iscrowd": 0}  # fmt: skip
_TRUTH = {"images": [_IMAGE], "annotations": [_ANN], "categories": [{"id": 1, "name": "car"}]}
_DET = {"image_id": 1, "category_id": 1, "bbox": [11.0, 10.0, 30.0, 30.0], "score": 0.9}
_SLICES = (1, 2, 3, 5, 7, 16, 64, 333)


def _pycocotools(gt, dt):
    from pycocotools.coco import COCO

    COCO(str(gt)).loadRes(str(dt))


def _where(data, bad):
    """Line and byte column of ``data[bad]``, 1-based."""
    line = data.count(b"\n", 0, bad) + 1
    return line, bad - (data.rfind(b"\n", 0, bad) + 1) + 1


def _refused_everywhere(tmp_path, monkeypatch, gt, dt, which, match):
    """Refused whole, at every slice size of both readers, twice with a cache (nothing
    stored, nothing served)."""
    reads = [lambda: load_predictions(dt, load_truth(gt))]
    reads.append(lambda: load_predictions(dt, load_truth(gt, cache_dir=tmp_path / "c"),
                                          cache_dir=tmp_path / "c"))  # fmt: skip
    for read in reads + reads[1:]:
        with pytest.raises(InputError, match=match) as caught:
            read()
        assert caught.value.path == str(which)
    cache = tmp_path / "c"
    assert not os.path.isdir(cache) or len(os.listdir(cache)) == (which == dt)
    for chunk in _SLICES:
        with monkeypatch.context() as m:
            m.setattr(results_stream, "CHUNK_BYTES", chunk)
            m.setattr(json_syntax, "CHUNK_BYTES", chunk)
            with pytest.raises(InputError, match=match):
                reads[0]()


_LATIN1 = [
    ("truth", "file_name"),
    ("truth", "info"),
    ("results", "caption"),
    ("results", "extra"),
]


@pytest.mark.parametrize("which, key", _LATIN1)
def test_latin1_bytes_nothing_reads_are_refused(tmp_path, monkeypatch, which, key):
    truth, det = json.loads(json.dumps(_TRUTH)), dict(_DET)
    if which == "truth":
        (truth["images"][0] if key == "file_name" else truth)[key] = "caf\u00e9.jpg"
    elif key == "caption":
        det = {"caption": "un caf\u00e9", **det}  # read by caption (first key)
    else:
        det[key] = {"note": "caf\u00e9"}
    gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
    gt.write_bytes(json.dumps(truth, ensure_ascii=False, indent=1).encode("latin-1"))
    dt.write_bytes(json.dumps([det, _DET], ensure_ascii=False).encode("latin-1"))
    bad_file = gt if which == "truth" else dt
    data = bad_file.read_bytes()
    with pytest.raises(UnicodeDecodeError) as caught:
        data.decode("utf-8")  # Python's strict decoder names the same byte
    line, column = _where(data, caught.value.start)
    with pytest.raises(UnicodeDecodeError):
        _pycocotools(gt, dt)
    match = f"not UTF-8 text: byte 0xe9 at line {line}, column {column} "
    _refused_everywhere(tmp_path, monkeypatch, gt, dt, bad_file, match)


def test_utf8_text_cut_by_any_slice_end_is_read(tmp_path, monkeypatch):
    """Two-, three- and four-byte characters in unread keys of both files: read at every
    slice size (a character split across chunks is one character), equal columns."""
    text = "caf\u00e9 \u6771\u4eac \U0001f697 \u00e9\u00e9"
    truth = json.loads(json.dumps(_TRUTH))
    truth["images"][0]["file_name"] = text
    gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
    gt.write_text(json.dumps(truth, ensure_ascii=False), encoding="utf-8")
    dt.write_text(json.dumps([{**_DET, "note": text}] * 3, ensure_ascii=False), "utf-8")
    _pycocotools(gt, dt)
    whole = load_predictions(dt, load_truth(gt))
    for chunk in range(1, len(dt.read_bytes()) + 1):
        with monkeypatch.context() as m:
            m.setattr(results_stream, "CHUNK_BYTES", chunk)
            m.setattr(json_syntax, "CHUNK_BYTES", max(chunk, 8))
            sliced = load_predictions(dt, load_truth(gt))
            assert sliced.boxes.tobytes() == whole.boxes.tobytes()


D = 4300  # sys.get_int_max_str_digits()'s default (Python documentation, "Integer
# string conversion length limitation")


@pytest.mark.parametrize(
    "shape, refused",
    [
        ("1" * (D + 1), True),
        ("-" + "1" * (D + 1), True),
        ("1" * D, False),
        ("1." + "1" * (D + 700), False),
        ("1" * (D + 700) + ".5", False),
        ("1" * (D + 700) + "e0", False),
        ("1e" + "1" * (D + 700), False),
        ("1E-" + "1" * (D + 700), False),
        ('"' + "1" * (D + 700) + '"', False),
        ("[1, " + "2" * (D + 1) + "]", True),
    ],
)
@pytest.mark.parametrize("where", ["results", "truth info", "truth annotation"])
def test_integers_beyond_pythons_digit_limit(tmp_path, monkeypatch, shape, refused, where):
    try:
        json.loads(shape)
        assert not refused  # Python's json reads it
    except ValueError as e:
        assert refused and "Exceeds the limit (4300 digits)" in str(e)
    truth, det = json.loads(json.dumps(_TRUTH)), dict(_DET)
    if where == "results":
        det["extra"] = "SHAPE"
    elif where == "truth info":
        truth["info"] = {"extra": "SHAPE"}
    else:
        truth["annotations"][0]["extra"] = "SHAPE"
    gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
    gt.write_text(json.dumps(truth).replace('"SHAPE"', shape))
    dt.write_text(json.dumps([_DET, det, _DET], indent=1).replace('"SHAPE"', shape))
    bad_file = dt if where == "results" else gt
    if not refused:
        _pycocotools(gt, dt)
        whole = load_predictions(dt, load_truth(gt))
        with monkeypatch.context() as m:
            for chunk in (5, 4301, 4302):
                m.setattr(results_stream, "CHUNK_BYTES", chunk)
                m.setattr(json_syntax, "CHUNK_BYTES", chunk)
                assert load_predictions(dt, load_truth(gt)).score.tolist() == whole.score.tolist()
        return
    with pytest.raises(ValueError, match="Exceeds the limit"):
        _pycocotools(gt, dt)
    data = bad_file.read_bytes()
    first = data.index(b"1" * 50 if "[" not in shape else b"2" * 50)
    first -= data[first - 1 : first] == b"-"
    line, column = _where(data, first)
    field = "" if "[" in shape else "field 'extra': "
    match = f"{field}an integer of more than 4300 digits at line {line}, column {column}:"
    _refused_everywhere(tmp_path, monkeypatch, gt, dt, bad_file, match)


@settings(max_examples=60, deadline=None)
@given(
    values=st.lists(
        st.tuples(
            st.sampled_from(["int", "neg", "frac", "exp", "str", "key"]),
            st.sampled_from([1, 4299, 4300, 4301, 4302, 6000, 9000, 13000]),
        ),
        min_size=1,
        max_size=5,
    ),
    chunk=st.sampled_from([1, 3, 1000, 1433, 1434, 4300, 4301, 8192, 1 << 20]),
)
def test_the_digit_search_agrees_with_pythons_json(tmp_path_factory, values, chunk):
    """Runs of digits of every length around the limit, as integers, fractions,
    exponents, strings and keys, fed to ``json_bytes.Checker`` in chunks of any size:
    refused exactly when ``json.loads`` raises its digit-limit ValueError."""
    parts = []
    for kind, n in values:
        digits = "7" * n
        parts.append(
            {
                "int": digits,
                "neg": "-" + digits,
                "frac": "0." + digits,
                "exp": "1e" + digits,
                "str": f'"{digits}"',
                "key": f'{{"{digits}": 1}}',
            }[kind]
        )
    text = "[" + ", ".join(parts) + "]"
    try:
        json.loads(text)
        refused = False
    except ValueError as e:
        assert "Exceeds the limit" in str(e)
        refused = True
    path = tmp_path_factory.mktemp("digits") / "f.json"
    path.write_text(text)
    data = path.read_bytes()
    checker = json_bytes.Checker(str(path), 0)
    try:
        for at in range(0, len(data), chunk):
            checker.feed(data[at : at + chunk])
        checker.finish()
        assert not refused
    except InputError as e:
        assert refused, str(e)
        first = min(m.start() for m in re.finditer(r"(?<![.e\d\"])-?7{4301,}(?![\d\"])", text))
        assert f"column {first + 1}:" in str(e)
