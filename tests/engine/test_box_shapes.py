"""Boxes of every shape in the box reading, against pycocotools 2.0.11.

When the first result has a non-empty ``bbox``, ``COCO.loadRes`` runs ``bb[0], bb[0] +
bb[2], bb[1], bb[1] + bb[3]`` and ``bb[2] * bb[3]`` on every result (pycocotools
2.0.11, coco.py): a box those Python lines raise on is refused on any record, also one
of an unlisted class or beyond the per-image cap of 100; a box they read but that is
not 4 numbers (5 entries, nested lists, text) raises only in ``computeIoU``
(``maskUtils.iou``: Nx4) or ``evaluateImg`` (a text area), so only on a detection
pycocotools compares (``test_uncompared``). Each case runs pycocotools 2.0.11
(``pycocotools_eval``) and the CLI (exit 2 naming file, record and field, no
traceback), whole and in 60-byte slices.
"""

import json

import pytest

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.__main__ import main
from evaluation.engine.loaders import results_stream, uncompared

from .conftest import pycocotools_eval
from .test_coco_reference import _compare

_SPLIT = {
    "images": [{"id": 1, "width": 100, "height": 100}],
    "annotations": [
        {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 30, 30], "area": 900.0}
        | {"iscrowd": 0}
    ],
    "categories": [{"id": 1, "name": "a"}],
}
_MISSING = object()

# (bbox, what pycocotools 2.0.11's loadRes raises on it) - checked in each test
_AT_LOAD = [
    (_MISSING, KeyError),  # ann['bbox']
    (None, TypeError),  # None[0]
    (5, TypeError),
    ({"x": 1}, KeyError),  # bb[0] of a dict
    ([], IndexError),
    ([1, 2, 3], IndexError),  # bb[3]
    ("abcd", TypeError),  # "c" * "d"
    (["1", "2", "3", "4"], TypeError),  # "3" * "4"
    ([1, None, 3, 4], TypeError),  # None + 4
    ([[1], 2, 3, 4], TypeError),  # [1] + 3
    ([1, "2", 3.5, "4"], TypeError),  # 3.5 * "4"
]
# read by loadRes, raising only when compared (pycocotools 2.0.11: Exception "list
# input can be bounding box (Nx4)", TypeError on a text area, ValueError in np.array)
_AT_COMPARE = [
    [1, 2, 3, 4, 5],
    [1, 2, 3, 4, None],
    [1, 2, 3, 4, [5]],
    ["1", 2, "3", 4],
    [1, "2", 3, "4"],
    [[1], 2, [3], 4],
    [1, [2], 3, [4]],
    ["a", 2, "b", 4],
]


def _detections(bbox, where):
    """A readable detection, then one with ``bbox``: compared (score 0.5, class 1),
    of an unlisted class (7), or beyond the cap (101st by score)."""
    out = [{"image_id": 1, "category_id": 1, "bbox": [10, 10, 30, 30], "score": 0.9}]
    if where == "beyond":
        out += [{"image_id": 1, "category_id": 1, "bbox": [50, 50, 9, 9], "score": 0.8}] * 100
    bad = {"image_id": 1, "category_id": 7 if where == "unlisted" else 1, "score": 0.1}
    if bbox is not _MISSING:
        bad["bbox"] = bbox
    return [*out, bad]


def _files(tmp_path, detections):
    gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
    gt.write_text(json.dumps(_SPLIT))
    dt.write_text(json.dumps(detections))
    return gt, dt


def _refused(gt, dt, record, capsys):
    """Refused naming the record and ``bbox``: loaded, and through the CLI (exit 2)."""
    with pytest.raises(InputError) as error:
        load_predictions(dt, load_truth(gt))
    assert (error.value.record, error.value.field) == (record, "bbox")
    assert main(["score", "--truth", str(gt), "--predictions", str(dt)]) == 2
    err = capsys.readouterr().err
    assert f"{dt}: {record}: field 'bbox'" in err and "Traceback" not in err


@pytest.mark.parametrize("chunk", [4 << 20, 60])
@pytest.mark.parametrize("where", ["compared", "unlisted", "beyond"])
@pytest.mark.parametrize(("bbox", "raises"), _AT_LOAD)
def test_a_box_loadres_cannot_read_is_refused_anywhere(
    tmp_path, monkeypatch, capsys, bbox, raises, where, chunk
):
    """pycocotools 2.0.11 raises in ``loadRes`` whatever the record's class or rank."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", chunk)
    detections = _detections(bbox, where)
    gt, dt = _files(tmp_path, detections)
    with pytest.raises(raises):
        pycocotools_eval(gt, dt)
    _refused(gt, dt, f"record {len(detections) - 1}", capsys)


@pytest.mark.parametrize("chunk", [4 << 20, 60])
@pytest.mark.parametrize("bbox", _AT_COMPARE)
def test_a_box_loadres_reads_is_refused_only_where_compared(
    tmp_path, monkeypatch, capsys, bbox, chunk
):
    """Compared, pycocotools 2.0.11 raises (refused, CLI exit 2); of an unlisted class
    or beyond the cap, it scores the file: the same numbers (``_compare``), the record
    dropped with its class or left out and counted (``uncompared_unfit``)."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", chunk)
    gt, dt = _files(tmp_path, _detections(bbox, "compared"))
    with pytest.raises(Exception):  # noqa: B017 - Exception, TypeError, ValueError
        pycocotools_eval(gt, dt)
    _refused(gt, dt, "record 1", capsys)
    for where, left_out in (("unlisted", 0), ("beyond", 1)):
        detections = _detections(bbox, where)
        _compare(tmp_path, _SPLIT, detections)
        predictions = load_predictions(tmp_path / "predictions.json", load_truth(gt))
        assert predictions.box_counts.get(uncompared.COUNT, 0) == left_out
        assert predictions.dropped == (where == "unlisted")


def test_the_red_team_case_scores(tmp_path, capsys):
    """audit F5: a 5-number box of an unlisted class; pycocotools 2.0.11 gives AP 1.0,
    the CLI exits 0 with it."""
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": [10, 10, 30, 30], "score": 0.9},
        {"image_id": 1, "category_id": 7, "bbox": [1, 2, 3, 4, 5], "score": 0.9},
    ]
    gt, dt = _files(tmp_path, detections)
    assert pycocotools_eval(gt, dt).stats[0] == pytest.approx(1.0)
    assert main(["score", "--truth", str(gt), "--predictions", str(dt), "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out)["summary"]["AP"] == pytest.approx(1.0, abs=1e-12)
