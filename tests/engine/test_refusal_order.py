"""The record a refusal names is the one pycocotools 2.0.11 raises at, at every slice size.

``COCO.loadRes`` (pycocotools 2.0.11, coco.py) reads its reading's fields one result
after another (``for id, ann in enumerate(anns)``: the box lines, or ``maskUtils.area``
then ``toBbox``), setting ``ann['id']`` at the end of each: given the results as a list
of dicts it changes them in place, so the record it raised at is the first one left
without an ``id`` (``_pycocotools_fails_at``). What it reads only when comparing
(``computeIoU``/``evaluateImg``: a bad box on a compared detection, a missing score)
fails after every record is loaded: a missing score of the group first (``-d['score']``
for its detections in file order), then its boxes all at once (``maskUtils.iou``, no
record to name: the first in file order is named). Files of random defects at random records are
read whole, in slices of random size (``results_stream.CHUNK_BYTES``), validated first,
and streamed into pieces: each names the same record and field, the ones pycocotools
raises at; through the CLI too (exit 2, no traceback).
"""

import contextlib
import copy
import io
import json

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.__main__ import main
from evaluation.engine.loaders import coco_json, results_stream, stream_predictions

from .test_mask_results import _rect

_SPLIT = {
    "images": [{"id": 1, "width": 40, "height": 30}],
    "annotations": [
        {"id": 1, "image_id": 1, "category_id": 1, "bbox": [2, 3, 10, 8], "area": 80.0}
        | {"iscrowd": 0}
    ],
    "categories": [{"id": 1, "name": "car"}],
}
_DROP = object()

# defect -> (fields replaced, the field named); loadRes raises on these (pycocotools
# 2.0.11: KeyError, TypeError, IndexError, UnicodeEncodeError, OverflowError)
_MASK_AT_LOAD = {
    "no segmentation": ({"segmentation": _DROP}, "segmentation"),
    "polygons": ({"segmentation": [[1, 2, 3, 4, 5, 6]]}, "segmentation"),
    "counts list": ({"segmentation": {"size": [30, 40], "counts": [0, 5]}}, "segmentation.counts"),
    "no counts": ({"segmentation": {"size": [30, 40]}}, "segmentation.counts"),
    "negative size": ({"segmentation": {"size": [-1, 40], "counts": "0"}}, "segmentation.size"),
    "size 2^64": ({"segmentation": {"size": [2**64, 40], "counts": "0"}}, "segmentation.size"),
    "surrogate": ({"segmentation": {"size": [30, 40], "counts": "0\ud800"}}, "segmentation.counts"),
    "surrogate, size": (
        {"segmentation": {"size": [-1, 4], "counts": "\ud800"}},
        "segmentation.counts",
    ),
}
# pycocotools raises only when it compares the record (computeIoU, evaluateImg)
_MASK_AT_COMPARE = {
    "bbox []": ({"bbox": []}, "bbox"),
    "bbox of 5": ({"bbox": [1, 2, 3, 4, 5]}, "bbox"),
    "no score": ({"score": _DROP}, "score"),
}
_BOX_AT_LOAD = {
    "bbox of 3": ({"bbox": [1, 2, 3]}, "bbox"),
    "bbox null": ({"bbox": None}, "bbox"),
    "no bbox": ({"bbox": _DROP}, "bbox"),
    "bbox text": ({"bbox": ["1", "2", "3", "4"]}, "bbox"),
    "bbox null inside": ({"bbox": [1, None, 3, 4]}, "bbox"),
}
_BOX_AT_COMPARE = {
    "bbox of 5": ({"bbox": [1, 2, 3, 4, 5]}, "bbox"),
    "bbox text area": ({"bbox": ["1", 2, "3", 4]}, "bbox"),
    "no score": ({"score": _DROP}, "score"),
}
_READINGS = {
    "mask": (_MASK_AT_LOAD, _MASK_AT_COMPARE),
    "box": (_BOX_AT_LOAD, _BOX_AT_COMPARE),
}


def _good(reading, i):
    record = {"image_id": 1, "category_id": 1, "score": round(0.9 - i * 0.01, 3)}
    if reading == "mask":
        record["segmentation"] = _rect(30, 40, 3 + i % 4, 2 + i % 5, 8, 10)
    else:
        record["bbox"] = [2 + i % 5, 3 + i % 4, 10, 8]
    return record


def _with(record, changes):
    record = dict(record)
    for key, value in changes.items():
        if value is _DROP:
            record.pop(key, None)
        else:
            record[key] = value
    return record


def _pycocotools_fails_at(gt, detections):
    """The record pycocotools 2.0.11's ``loadRes`` raises at (None: it loads them all),
    and whether its evaluation then raises."""
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    anns = copy.deepcopy(detections)
    with contextlib.redirect_stdout(io.StringIO()):
        coco = COCO(str(gt))
        try:
            loaded = coco.loadRes(anns)
        except Exception:  # noqa: BLE001 - whatever it raises
            return next(i for i, a in enumerate(anns) if "id" not in a), True
        try:
            evaluator = COCOeval(coco, loaded, "bbox")
            evaluator.evaluate()
            evaluator.accumulate()
        except Exception:  # noqa: BLE001
            return None, True
    return None, False


def _error(load):
    with pytest.raises(InputError) as error:
        load()
    return error.value.record, error.value.field


@st.composite
def _files(draw):
    reading = draw(st.sampled_from(sorted(_READINGS)))
    at_load, at_compare = _READINGS[reading]
    n = draw(st.integers(2, 9))
    detections = [_good(reading, i) for i in range(n)]
    fields = {}
    for i in draw(st.lists(st.integers(1, n - 1), min_size=1, max_size=4, unique=True)):
        kinds = {**at_load, **at_compare}
        name = draw(st.sampled_from(sorted(kinds)))
        changes, field = kinds[name]
        detections[i] = _with(detections[i], changes)
        fields[i] = (field, name in at_load)
    return reading, detections, fields


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(_files(), st.integers(16, 400))
def test_the_record_named_is_where_pycocotools_raises(tmp_path, files, chunk):
    _, detections, fields = files
    gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
    gt.write_text(json.dumps(_SPLIT))
    dt.write_text(json.dumps(detections))
    truth = load_truth(gt)
    fails_at, raises = _pycocotools_fails_at(gt, detections)
    assert raises  # every file holds a defect on a compared detection
    whole = _error(lambda: load_predictions(dt, truth))
    if fails_at is not None:  # loadRes raised there: that record, its defect's field
        assert whole == (f"record {fails_at}", fields[fails_at][0])
        assert fields[fails_at][1] and not any(
            at_load for i, (_, at_load) in fields.items() if i < fails_at
        )
    else:  # only on comparing (one image and class: one group)
        scores = [i for i, (field, _) in fields.items() if field == "score"]
        if scores:  # computeIoU reads every score of the group (file order) first
            assert whole == (f"record {min(scores)}", "score")
        else:  # then maskUtils.iou raises on the group's boxes at once: no record
            assert whole[1] == "bbox" and int(whole[0].split()[1]) in fields
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(results_stream, "CHUNK_BYTES", chunk)
        assert _error(lambda: load_predictions(dt, truth)) == whole
        assert _error(lambda: list(stream_predictions(dt, truth))) == whole
        patch.setattr(coco_json, "VALIDATE_FIRST_BYTES", 0)
        assert _error(lambda: load_predictions(dt, truth)) == whole


def test_the_red_team_case(tmp_path, monkeypatch, capsys):
    """audit F6: under the mask reading, record 1 has no segmentation and record 2 a
    ``bbox: []``; pycocotools 2.0.11 raises KeyError at record 1 in ``loadRes``. A
    later record ``loadRes`` raises on (counts as a list, TypeError) does not come first
    either. Whole, in 100-byte slices and through the CLI: record 1, segmentation."""
    good = _good("mask", 0)
    for later in ({"bbox": []}, {"segmentation": {"size": [30, 40], "counts": [0, 5]}}):
        detections = [good, _with(good, {"segmentation": _DROP}), _with(good, later), good]
        gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
        gt.write_text(json.dumps(_SPLIT))
        dt.write_text(json.dumps(detections))
        assert _pycocotools_fails_at(gt, detections) == (1, True)
        for chunk in (4 << 20, 100):
            monkeypatch.setattr(results_stream, "CHUNK_BYTES", chunk)
            truth = load_truth(gt)
            named = _error(lambda: load_predictions(dt, truth))  # noqa: B023 - called here
            assert named == ("record 1", "segmentation")
            assert main(["score", "--truth", str(gt), "--predictions", str(dt)]) == 2
            err = capsys.readouterr().err
            assert f"{dt}: record 1: field 'segmentation'" in err and "Traceback" not in err
