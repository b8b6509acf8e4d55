"""Integers beyond float64's range (2**1024 written out in digits) against pycocotools
2.0.11 (``loaders.beyond_float64``).

The engine reads such an integer as infinite; pycocotools keeps it as a Python ``int``.
Each case runs pycocotools 2.0.11 itself (``COCO.loadRes``, ``COCOeval('bbox')``
evaluate/accumulate/summarize, and ``recall40``'s settings): where it raises
OverflowError (``loadRes``' box arithmetic, ``computeIoU`` on a compared box) the
engine refuses with the file, record and field; where its ``accumulate`` swallows the
OverflowError of a score and leaves the later precision at 0, the engine refuses the
file under ``coco`` and ``recall40`` (known deviation: the cut is not modelled) and
the test shows the reference's numbers differ from those of the same file with the
score written as a float (what the engine would score); where pycocotools never meets
the integer, the engine scores the file equal to it.
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
from .test_exact_scores import _numbers_equal, pycocotools_recall40

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


def _as_float(value):
    if type(value) is int and abs(value) >= 2**1024:
        return 1e400 if value > 0 else -1e400  # json.dumps writes Infinity
    return value


def _refused(gt, dt, protocol, record, field):
    truth = load_truth(gt)
    with pytest.raises(InputError) as caught:
        evaluate(truth, load_predictions(dt, truth), protocol)
    assert caught.value.record == f"record {record}", str(caught.value)
    assert caught.value.field == field, str(caught.value)
    assert str(dt) in str(caught.value)
    return str(caught.value)


def _reference(gt, dt, protocol):
    return pycocotools_eval(gt, dt) if protocol == "coco" else pycocotools_recall40(gt, dt)


def _ap(reference, protocol):
    if protocol == "coco":
        return reference.stats[0]
    precision = reference.eval["precision"][0, :, :, 0, 0]
    present = [np.mean(precision[:, k]) for k in range(precision.shape[1]) if precision[0, k] > -1]
    return np.mean(present)


def _score_refused(tmp_path, dets, record, protocols=("coco", "recall40")):
    """pycocotools 2.0.11 scores the file, otherwise than the same file with floats
    (its precision fill stops at the score); the engine refuses it naming the score."""
    gt, dt = _write(tmp_path, dets)
    _, dt_float = _write(tmp_path, [{**d, "score": _as_float(d["score"])} for d in dets], "f.json")
    for protocol in protocols:
        reference, as_float = _reference(gt, dt, protocol), _reference(gt, dt_float, protocol)
        assert _ap(reference, protocol) < _ap(as_float, protocol), protocol
        assert "stops filling the precision" in _refused(gt, dt, protocol, record, "score")


def _scored_equal(tmp_path, dets):
    """pycocotools 2.0.11 never meets the integer: the engine scores it as it does."""
    gt, dt = _write(tmp_path, dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    _numbers_equal(pycocotools_eval(gt, dt), evaluate(truth, predictions, "coco"), truth)
    return gt, dt


def test_one_matching_detection_of_score_2_to_the_1024(tmp_path):
    """pycocotools 2.0.11: AP = AP50 = AP75 = 1/101 (only q[0] is filled); refused under
    coco and recall40 naming record 0 and ``score``; the VOC protocols (the devkit reads
    doubles) score it as infinite."""
    dets = [_det(1, 1, [10, 10, 30, 30], HUGE)]
    gt, dt = _write(tmp_path, dets)
    reference = pycocotools_eval(gt, dt)
    filled = reference.eval["precision"][0, :, 0, 0, 2]
    assert filled[0] == pytest.approx(1.0) and not filled[1:].any()  # 1 / (1 + eps)
    _score_refused(tmp_path, dets, 0)
    truth = load_truth(gt)
    assert evaluate(truth, load_predictions(dt, truth), "voc")["summary"]["AP"] is not None


def test_several_classes_and_ranks(tmp_path):
    """The integer at different ranks: -2**1024 last of its image in class a (the fill
    of class a stops at the recall point that lands on it), 2**1024 + 5 first in class
    b; the first such record is named."""
    dets = [
        _det(1, 1, [10, 10, 30, 30], 0.9),
        _det(1, 1, [60, 60, 10, 10], 0.8),
        _det(2, 1, [50, 50, 20, 20], -HUGE),
        _det(1, 2, [0, 0, 20, 20], 0.3),
        _det(1, 2, [40, 0, 20, 20], HUGE + 5),
    ]
    _score_refused(tmp_path, dets, 2)


def test_mixed_with_floats_and_small_integers(tmp_path):
    """A float and such an integer in one image's list: numpy makes an object array
    (no OverflowError in numpy 2 there), pycocotools scores the file with its fill cut;
    refused."""
    dets = [
        _det(1, 1, [60, 60, 10, 10], 0.5),
        _det(1, 1, [10, 10, 30, 30], HUGE),
        _det(2, 1, [50, 50, 20, 20], 7),
        _det(2, 1, [0, 50, 20, 20], 2**60),
    ]
    _score_refused(tmp_path, dets, 1)


def test_beyond_the_cap_and_without_ground_truth_scored_as_pycocotools(tmp_path):
    """Never in an accumulated list (the 101st of its image under coco's cap of 100), in
    a class without ground truth (``npig == 0`` skips the fill) or of a class the split
    does not list: scored equal to pycocotools 2.0.11. Without a cap (recall40) the
    101st is accumulated: refused there."""
    dets = [_det(1, 1, [10, 10, 30, 30], 0.9)]
    dets += [_det(1, 1, [60, 60, 10, 10 + k / 8], 0.5) for k in range(99)]
    dets += [_det(1, 1, [0, 60, 10, 10], -HUGE)]
    dets += [_det(2, 3, [0, 0, 10, 10], HUGE), _det(2, 9, [0, 0, 10, 10], HUGE)]
    gt, dt = _scored_equal(tmp_path, dets)
    _refused(gt, dt, "recall40", 100, "score")


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
    """Exit 2 naming file, record and field under coco; under voc exit 0 and strict
    JSON on stdout (the infinite score is never written as a bare literal)."""
    gt, dt = _write(tmp_path, [_det(1, 1, [10, 10, 30, 30], HUGE)])
    refused = _cli(gt, dt, "coco")
    assert refused.returncode == 2
    assert f"{dt}: record 0: field 'score'" in refused.stderr
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
