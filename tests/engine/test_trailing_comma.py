"""A comma after the last element of an array (``[{...},]``, ``[{...} , \\n ]``) is
refused, in a results file (box and mask readings, whole-file and sliced reads, with a
cache) and in a ground-truth file, at the closing bracket's line and column.
References: RFC 8259 section 5 (an array's values are separated by commas: no empty
value); Python's ``json`` module raises "Expecting value" there (its ``lineno`` and
``colno`` are checked against ours), so pycocotools 2.0.11 (``COCO``, ``loadRes``:
``json.load``) refuses both files. Before, a results file so ending was scored."""

import json
import os

import pytest

from evaluation.engine import load_predictions, load_truth
from evaluation.engine.errors import InputError
from evaluation.engine.loaders import json_syntax, results_stream

from .test_chunk_boundaries import H, W, _rle

_TRUTH = {
    "images": [{"id": 1, "width": W, "height": H}],
    "annotations": [
        {"id": 1, "image_id": 1, "category_id": 1, "bbox": [2, 3, 10, 8], "area": 80.0,
         "iscrowd": 0},
    ],
    "categories": [{"id": 1, "name": "car"}],
}  # fmt: skip
_BOX = '{"image_id":1,"category_id":1,"bbox":[2,3,10,8],"score":0.9}'
_MASK = json.dumps(
    {"image_id": 1, "category_id": 1, "segmentation": _rle(3, 2, 8, 10), "score": 0.8}
)


def _python_json_error(path):
    """Line and column of Python's json error on the file (pycocotools' reader)."""
    with open(path) as f:
        with pytest.raises(json.JSONDecodeError) as caught:
            json.load(f)
    assert caught.value.msg == "Expecting value"
    return caught.value.lineno, caught.value.colno


def _pycocotools_refuses(gt, dt):
    from pycocotools.coco import COCO

    with pytest.raises(json.JSONDecodeError):
        COCO(str(gt)).loadRes(str(dt))


@pytest.mark.parametrize(
    "text",
    [
        f"[{_BOX},]",
        f"[{_BOX},{_BOX} , \n ]",
        f"[\n  {_BOX},\n  {_BOX},\n]\n",
        f"[{_MASK},]",
        f"[{_MASK},\n{_MASK}\t,\r\n  ]  ",
    ],
)
def test_a_results_file_with_a_trailing_comma_is_refused(tmp_path, monkeypatch, text):
    gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
    gt.write_text(json.dumps(_TRUTH))
    dt.write_text(text)
    line, column = _python_json_error(dt)
    _pycocotools_refuses(gt, dt)
    truth = load_truth(gt)
    where = f"not valid JSON: trailing comma in array at line {line}, column {column}$"
    with pytest.raises(InputError, match=where):
        load_predictions(dt, truth)
    cache = tmp_path / "cache"
    for _ in range(2):  # nothing stored: refused again, never served
        with pytest.raises(InputError, match=where):
            load_predictions(dt, truth, cache_dir=cache)
    assert not [n for n in os.listdir(cache) if n.endswith(".npz")]
    for chunk in range(1, len(dt.read_bytes()) + 1):
        with monkeypatch.context() as m:
            m.setattr(results_stream, "CHUNK_BYTES", chunk)
            with pytest.raises(InputError, match=where):
                load_predictions(dt, truth)


def test_the_same_records_without_the_comma_are_scored(tmp_path):
    """The control: the file without its trailing comma reads (Python's json too)."""
    gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
    gt.write_text(json.dumps(_TRUTH))
    dt.write_text(f"[{_BOX},{_BOX} , \n ]".replace(" , \n ]", "\n ]"))
    assert len(json.loads(dt.read_text())) == 2
    assert len(load_predictions(dt, load_truth(gt)).score) == 2


@pytest.mark.parametrize("key", ["images", "annotations", "categories"])
def test_a_truth_file_with_a_trailing_comma_is_refused(tmp_path, monkeypatch, key):
    """The ground-truth reader (``json_syntax``) refuses it too, whole and in slices."""
    text = json.dumps(_TRUTH, indent=1)
    array = text.index(f'"{key}"')
    close = text.index("]", text.index("}", array))
    gt = tmp_path / "truth.json"
    gt.write_text(text[:close].rstrip() + ",\n " + text[close:])
    line, column = _python_json_error(gt)
    from pycocotools.coco import COCO

    with pytest.raises(json.JSONDecodeError):
        COCO(str(gt))
    for chunk in (json_syntax.CHUNK_BYTES, 7, 23, 64):
        with monkeypatch.context() as m:
            m.setattr(json_syntax, "CHUNK_BYTES", chunk)
            with pytest.raises(InputError, match=f"line {line}, column {column}$"):
                load_truth(gt, cache_dir=tmp_path / "cache")
