"""Integers beyond float64's range (2**1024 written out in digits) against pycocotools
2.0.11 (``loaders.beyond_float64``).

The engine reads such an integer as infinite; pycocotools keeps it as a Python ``int``.
Each case runs pycocotools 2.0.11 itself (``COCO.loadRes``, ``COCOeval('bbox')``
evaluate/accumulate/summarize, and ``recall40``'s settings): where it raises
OverflowError (``loadRes``' box arithmetic, ``computeIoU`` on a compared box) the
engine refuses with the file, record and field; where pycocotools never meets the
integer, the engine scores the file equal to it. Scores beyond float64's range, where
its ``accumulate`` swallows an OverflowError and stops its precision fill, are scored
as it scores them: ``test_beyond_float64_scores.py``.
"""

import json
import subprocess
import sys

import numpy as np
import pytest

from evaluation.engine import InputError, evaluate, load_predictions, load_truth, shards
from evaluation.engine.loaders import results_stream
from evaluation.engine.pieces import stream_pieces

from .conftest import pycocotools_eval
from .test_exact_scores import _numbers_equal

HUGE = 2**1024  # no float64: float() raises OverflowError
SPLIT = {
    "images": [{"id": 1, "width": 100, "height": 100}, {"id": 2, "width": 100, "height": 100}],
    "categories": [{"id": 1, "name": "a"}, {"id": 2, "name": "b"}, {"id": 3, "name": "c"}],
    "annotations": [
        {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 30, 30], "area": 900},
        {"id": 2, "image_id": 2, "category_id": 1, "bbox": [50, 50, 20, 20], "area": 400},
        {"id": 3, "image_id": 1, "category_id": 2, "bbox": [0, 0, 20, 20], "area": 400},
    ],
}
for _ann in SPLIT["annotations"]:
    _ann["iscrowd"] = 0


def _det(image, cls, bbox, score, **extra):
    return {"image_id": image, "category_id": cls, "bbox": bbox, "score": score, **extra}


def _write(tmp_path, dets, name="dt.json", split=SPLIT):
    gt, dt = tmp_path / "gt.json", tmp_path / name
    gt.write_text(json.dumps(split))
    dt.write_text(json.dumps(dets))
    return gt, dt


def _refused(gt, dt, protocol, record, field):
    truth = load_truth(gt)
    with pytest.raises(InputError) as caught:
        evaluate(truth, load_predictions(dt, truth), protocol)
    assert caught.value.record == f"record {record}", str(caught.value)
    assert caught.value.field == field, str(caught.value)
    assert str(dt) in str(caught.value)
    return str(caught.value)


def _scored_equal(tmp_path, dets):
    """pycocotools 2.0.11 never meets the integer: the engine scores it as it does."""
    gt, dt = _write(tmp_path, dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    _numbers_equal(pycocotools_eval(gt, dt), evaluate(truth, predictions, "coco"), truth)
    return gt, dt


@pytest.mark.parametrize("reading", ["boxes", "mask and bbox", "caption"])
def test_a_compared_box_beyond_float64_is_refused(tmp_path, reading):
    """pycocotools 2.0.11's computeIoU raises OverflowError on a compared result's box
    (here on the image without ground truth of the class, too); refused naming the
    record and ``bbox``."""
    from pycocotools import mask

    extra = {}
    if reading == "caption":
        extra = {"caption": "x", "area": 900}
    elif reading == "mask and bbox":
        pixels = np.zeros((100, 100), np.uint8, order="F")
        pixels[10:40, 10:40] = 1
        encoded = mask.encode(pixels)
        extra = {"segmentation": {**encoded, "counts": encoded["counts"].decode()}}
    dets = [
        _det(1, 1, [10, 10, 30, 30], 0.9, **extra),
        _det(2, 2, [10, 10, HUGE, 30], 0.4, **extra),
    ]
    gt, dt = _write(tmp_path, dets)
    with pytest.raises(OverflowError):
        pycocotools_eval(gt, dt)
    assert "computeIoU" in _refused(gt, dt, "coco", 1, "bbox")


def test_box_arithmetic_in_load_res(tmp_path):
    """loadRes computes x + w, y + h and w * h for every result: an integer beyond
    float64 with a float partner raises OverflowError there (also on the 101st result
    of an image, never compared, and on a result of a class the split does not list); with integer partners Python computes exactly, and a
    result never compared is scored as pycocotools 2.0.11 scores it."""
    dets = [_det(1, 1, [10, 10, 30, 30], 0.9)]
    dets += [_det(1, 1, [60, 60, 10, 10], 0.5) for _ in range(99)]
    _scored_equal(tmp_path, [*dets, _det(1, 1, [0, 60, HUGE, 10], 0.1)])
    for last in (_det(1, 1, [0, 60, HUGE, 10.5], 0.1), _det(2, 9, [0.5, 60, HUGE, 10], 0.1)):
        gt, dt = _write(tmp_path, [*dets, last])  # the second: a class the split lacks
        with pytest.raises(OverflowError):
            pycocotools_eval(gt, dt)
        assert "loadRes" in _refused(gt, dt, "coco", 100, "bbox")


def test_an_area_beyond_float64_is_compared_exactly(tmp_path):
    """The caption reading's own ``area`` is only compared with the size ranges (exact
    in Python): 2**1024 and -2**1024 are outside every range, as infinite; scored
    equal to pycocotools 2.0.11."""
    dets = [
        _det(1, 1, [10, 10, 30, 30], 0.9, caption="x", area=HUGE),
        _det(2, 1, [50, 50, 20, 20], 0.8, caption="x", area=-HUGE),
        _det(1, 2, [0, 0, 20, 20], 0.7, caption="x", area=400),
    ]
    _scored_equal(tmp_path, dets)


def test_whole_sliced_streamed_and_cached_alike(tmp_path, monkeypatch):
    """Tiny slices, the streamed pieces and a cached load carry the same refusal."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 64)
    dets = [_det(1, 1, [10, 10, 30, 30], 0.9), _det(2, 1, [50, 50, 20, 20], HUGE)]
    dets += [_det(1, 2, [0, 0, 20, 20], 0.5), _det(2, 2, [0, 0, HUGE, 20], 0.4)]
    gt, dt = _write(tmp_path, dets)
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    assert whole.score_conflicts["100"]["overflow"]["record"] == "record 3"  # the box first
    cached = [load_predictions(dt, truth, cache_dir=str(tmp_path / "c")) for _ in range(2)]
    assert all(c.score_conflicts == whole.score_conflicts for c in cached)
    ranges = shards.plan(truth.n_images, 2)
    pieces_dir = tmp_path / "pieces"
    pieces_dir.mkdir()
    streamed = stream_pieces(dt, truth, ranges, str(pieces_dir))
    for path in streamed.paths:
        s_truth, s_box, s_pred, s_pos = shards.load_piece(path)
        with pytest.raises(InputError, match="record 3"):
            shards.match_shard(s_truth, s_box, s_pred, s_pos, "coco")


def _cli(gt, dt, protocol):
    return subprocess.run(
        [sys.executable, "-m", "evaluation.engine", "score", "--truth", str(gt)]
        + ["--predictions", str(dt), "--protocol", protocol, "--format", "json"],
        capture_output=True,
        text=True,
    )


def test_the_cli(tmp_path):
    """A compared box beyond float64: exit 2 naming file, record and field under coco;
    under voc exit 0 and strict JSON on stdout (the infinite box is never written as a
    bare literal)."""
    gt, dt = _write(tmp_path, [_det(1, 1, [10, 10, 30, HUGE], 0.5)])
    refused = _cli(gt, dt, "coco")
    assert refused.returncode == 2
    assert f"{dt}: record 0: field 'bbox'" in refused.stderr
    assert refused.stdout == ""
    scored = _cli(gt, dt, "voc")
    assert scored.returncode == 0, scored.stderr

    def strict(token):
        raise ValueError(token)

    json.loads(scored.stdout, parse_constant=strict)


def _split_with(*annotations):
    split = json.loads(json.dumps(SPLIT))
    split["annotations"] += [{"iscrowd": 0, "area": 100, **a} for a in annotations]
    return split


def test_a_ground_truth_box_beyond_float64(tmp_path):
    """pycocotools 2.0.11's computeIoU converts every listed annotation's box (here on
    an image without detections): OverflowError; refused under coco and recall40 naming
    ``annotations[k]`` and ``bbox``; the VOC protocols score it as infinite. Left out by
    both where pycocotools never loads it (an unlisted category; an annotation whose id
    a later one takes over), and an ``area`` beyond float64 is only compared: scored
    equal to pycocotools 2.0.11."""
    dets = [_det(1, 1, [10, 10, 30, 30], 0.9)]
    huge = {"id": 9, "image_id": 2, "category_id": 2, "bbox": [0, 0, HUGE, 10]}
    gt, dt = _write(tmp_path, dets, split=_split_with(huge))
    with pytest.raises(OverflowError):
        pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    for protocol in ("coco", "recall40"):
        with pytest.raises(InputError) as caught:
            evaluate(truth, predictions, protocol)
        assert (caught.value.record, caught.value.field) == ("annotations[3]", "bbox")
    assert evaluate(truth, predictions, "voc")["summary"]["AP"] is not None
    unlisted = {**huge, "category_id": 7}
    taken_over = [huge, {**huge, "bbox": [0, 0, 10, 10]}]
    big_area = {**huge, "bbox": [0, 0, 10, 10], "area": HUGE}
    for annotations in ([unlisted], taken_over, [big_area]):
        gt, dt = _write(tmp_path, dets, split=_split_with(*annotations))
        truth = load_truth(gt)
        ours = evaluate(truth, load_predictions(dt, truth), "coco")
        _numbers_equal(pycocotools_eval(gt, dt), ours, truth)


def test_miss_rate_cityscale_has_no_score_fill(tmp_path):
    """The CityPersons script's ``accumulate`` fills only the miss rates (``q[ri] =
    recall[pi]``; no float64 score array: the transliteration
    ``pedestrian_oracle.cityscale_coco``, from the published code, from memory): a score
    of 2**1024 or -2**1024 is ranked exactly (object arrays) and nothing overflows;
    scored equal to the transliteration on the exact integers."""
    from .test_cityscale_exact_scores import _audit_case
    from .test_pedestrian_cityscale import _compare

    dataset, results, _, _ = _audit_case(tmp_path)
    results[1]["score"] = HUGE  # the false positive of image 2 first
    results[0]["score"] = -HUGE
    ours = _compare(tmp_path, dataset, results)
    assert ours["levels"]["reasonable"]["miss_rate"] is not None
