"""Results read "as given": the first result has none of caption, a non-empty bbox,
segmentation and keypoints, so pycocotools 2.0.11 ``loadRes`` keeps every result as
written (own ``bbox``, ``area`` and ``id``; ``createIndex`` keys them by id).

Each worked example is run through pycocotools 2.0.11 on the same two files
(``test_coco_reference._compare``: every summary number and per-class AP/AP50/AP75/
recall and size bucket equal): ids of 0, below 0, NaN, null and text numbers (a box one
of them matches stays free: ``gtm > 0``), repeated ids (the last result of an id in
the place of each, across images and classes), a first result that is never compared
(unlisted class, replaced by a later result of its id). Where pycocotools raises, the
file is refused naming file, record and field (CLI: exit 2, no traceback). Whole,
sliced, validated-first, streamed into pieces, sharded and cached loads agree; a
hypothesis sweep mixes all of it.
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, evaluate, load_predictions, load_truth
from evaluation.engine.loaders import as_given

from .conftest import pycocotools_eval
from .test_coco_reference import _compare
from .test_mask_results import _files

_SPLIT = {
    "images": [{"id": i, "width": 100, "height": 100} for i in (1, 2, 3)],
    "categories": [{"id": 1, "name": "car"}, {"id": 2, "name": "van"}],
    "annotations": [
        {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 20, 20], "area": 400},
        {"id": 2, "image_id": 1, "category_id": 1, "bbox": [50, 50, 20, 20], "area": 400},
        {"id": 3, "image_id": 2, "category_id": 1, "bbox": [10, 10, 20, 20], "area": 400},
        {"id": 4, "image_id": 2, "category_id": 2, "bbox": [50, 50, 30, 30], "area": 900},
        {"id": 5, "image_id": 3, "category_id": 2, "bbox": [5, 5, 40, 40], "area": 1600},
    ],
}
for _a in _SPLIT["annotations"]:
    _a["iscrowd"] = 0

#: A first result pycocotools never compares (class 9 is not listed), without bbox.
HEAD = {"id": 100, "image_id": 1, "category_id": 9, "score": 0.5}


def det(id_, image, category, score, box=(10, 10, 20, 20), area=None):
    area = box[2] * box[3] if area is None else area
    return {"id": id_, "image_id": image, "category_id": category, "score": score,
            "bbox": list(box), "area": area}  # fmt: skip


def _scores_as_pycocotools(tmp_path, detections, **counts):
    """Equal to pycocotools 2.0.11 on the same files; read as given; ``counts``."""
    _compare(tmp_path, _SPLIT, detections)
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "predictions.json", truth)
    assert "as_given_area" in predictions.box_counts
    for key, value in counts.items():
        assert predictions.box_counts[key] == value, key
    return truth, predictions


def test_own_bbox_area_and_ids_score_as_pycocotools(tmp_path):
    """Own boxes, areas unlike w*h (size buckets read them), ids 1..n; the protocol
    record names the reading."""
    from evaluation.engine.matching import match
    from evaluation.engine.provenance import protocol_record

    dets = [HEAD, det(7, 1, 1, 0.9, area=30), det(8, 1, 1, 0.8, (50, 50, 20, 21)),
            det(9, 2, 2, 0.7, (52, 50, 30, 30), area=5000), det(10, 3, 2, 0.6, (0, 0, 40, 40))]  # fmt: skip
    truth, predictions = _scores_as_pycocotools(tmp_path, dets, replaced_by_id=0, free_id=0)
    assert predictions.free is None and predictions.area.tolist() == [30, 420, 5000, 1600]
    result = evaluate(truth, predictions, "coco")
    record = protocol_record("coco", truth, predictions, match(truth, predictions, "coco"), result)
    assert "own area, bbox and id as given" in record["area_source"]["predictions"]


@pytest.mark.parametrize("free_id", [0, -3, float("nan"), None, "0", " -2", False, -0.5])
def test_an_id_not_above_0_leaves_the_box_free(tmp_path, free_id):
    """``evaluateImg`` writes the detection's id into ``gtm`` and skips a box only
    while ``gtm > 0``: after a detection of such an id matched box 1, the next one
    takes it again — two true positives on one box, as pycocotools 2.0.11 counts."""
    dets = [HEAD, det(free_id, 1, 1, 0.9), det(5, 1, 1, 0.8, (11, 10, 20, 20)),
            det(6, 1, 1, 0.7, (10, 11, 20, 20)), det(8, 2, 1, 0.6)]  # fmt: skip
    truth, predictions = _scores_as_pycocotools(tmp_path, dets, free_id=1)
    assert predictions.free.tolist() == [True, False, False, False]
    reference = pycocotools_eval(tmp_path / "truth.json", tmp_path / "predictions.json")
    image_1 = next(e for e in reference.evalImgs if e and e["image_id"] == 1)
    assert image_1["dtMatches"][0].tolist() == [1, 1, 0]  # box 1 taken twice at IoU .5


def test_free_ids_are_read_as_matches_under_voc(tmp_path):
    """The VOC devkit reads no ids (common practice: its ``VOCevaldet`` marks boxes
    detected): under ``voc`` an id-0 detection takes its box and the next one on it is
    a duplicate — worked by hand: 1 TP at precision 1 of 3 car boxes, AP = 1/3 — while
    under ``coco`` both are true positives (2 TP, 0 FP)."""
    dets = [HEAD, det(0, 1, 1, 0.9), det(5, 1, 1, 0.8, (11, 10, 20, 20))]
    gt, dt = _files(tmp_path, _SPLIT, dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    car = evaluate(truth, predictions, "voc")["per_class"]["car"]
    assert (car["AP"], car["tp"], car["fp"]) == (pytest.approx(1 / 3), 1.0, 1.0)
    car = evaluate(truth, predictions, "coco")["per_class"]["car"]
    assert (car["tp"], car["fp"]) == (2.0, 0.0)


def test_a_repeated_id_puts_its_last_result_in_each_place(tmp_path):
    """``loadAnns`` gives the last result of an id for every result of it: ids 7
    (image 2, then image 1) both become the image-1 result, compared twice in image
    1's group — the copy taking the image-2 result's place in ``getAnnIds``' image
    order —; the image-2 result of id 7 is gone (pycocotools 2.0.11)."""
    dets = [HEAD, det(7, 2, 1, 0.3), det(2, 1, 1, 0.9), det(7, 1, 1, 0.95, (11, 11, 20, 20)),
            det(8, 2, 2, 0.6, (50, 50, 30, 30))]  # fmt: skip
    truth, predictions = _scores_as_pycocotools(tmp_path, dets, replaced_by_id=1)
    assert predictions.score.tolist() == [0.9, 0.95, 0.95, 0.6]
    assert predictions.image.tolist() == [0, 0, 0, 1]


def test_a_repeated_id_of_an_unlisted_class_removes_the_listed_one(tmp_path):
    """The last result of id 7 has class 9: the listed result of id 7 becomes it and
    is never compared (pycocotools 2.0.11: its box 1 is missed)."""
    dets = [HEAD, det(7, 1, 1, 0.9), det(8, 2, 1, 0.8), det(7, 1, 9, 0.95)]
    truth, predictions = _scores_as_pycocotools(tmp_path, dets, replaced_by_id=1)
    assert len(predictions) == 1 and predictions.dropped == 3


@pytest.mark.parametrize("same", [[1, 1.0, True], [2, 2.0], ["7", "7"]])
def test_equal_ids_of_any_type_are_one_key(tmp_path, same):
    """A dict keys 1, 1.0 and true alike (Python equality), "7" apart from 7: all but
    the last result of such ids are replaced, as in pycocotools 2.0.11's
    ``createIndex``."""
    dets = [HEAD] + [det(v, 2, 2, 0.9 - k / 10, (60 + k, 60, 10, 10)) for k, v in enumerate(same)]
    _scores_as_pycocotools(tmp_path, dets, replaced_by_id=len(same) - 1)


@pytest.mark.parametrize("chunk", [None, 60])
def test_nan_ids_are_one_key(tmp_path, monkeypatch, chunk):
    """Python's ``json`` reads every ``NaN`` literal as one float object, so
    pycocotools 2.0.11's ``createIndex`` keys all NaN ids together (the later result
    replaces the earlier, run); also when the file is read in slices of 60 bytes."""
    from evaluation.engine.loaders import results_stream

    if chunk:
        monkeypatch.setattr(results_stream, "CHUNK_BYTES", chunk)
    dets = [HEAD, det(123456, 1, 1, 0.9), det(4, 3, 2, 0.7), det(123456, 2, 1, 0.8)]
    text = json.dumps(dets).replace("123456", "NaN")
    (tmp_path / "truth.json").write_text(json.dumps(_SPLIT))
    (tmp_path / "predictions.json").write_text(text)
    reference = pycocotools_eval(tmp_path / "truth.json", tmp_path / "predictions.json")
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "predictions.json", truth)
    assert predictions.box_counts["replaced_by_id"] == 1
    assert predictions.score.tolist() == [0.8, 0.8, 0.7]
    result = evaluate(truth, predictions, "coco")
    assert result["summary"]["AP"] == pytest.approx(reference.stats[0], abs=1e-12)
    assert result["summary"]["AR100"] == pytest.approx(reference.stats[8], abs=1e-12)


def test_a_first_result_replaced_by_a_later_one_is_never_compared(tmp_path):
    """The first result (no bbox, ``bbox: []``) shares id 5 with a later result, which
    takes its place: pycocotools 2.0.11 never reads the first's bbox."""
    for first in ({}, {"bbox": []}):
        dets = [{"id": 5, "image_id": 1, "category_id": 1, "score": 0.1, **first},
                det(6, 1, 1, 0.7), det(5, 2, 1, 0.8)]  # fmt: skip
        _scores_as_pycocotools(tmp_path, dets, replaced_by_id=1)


def test_unfit_records_beyond_the_cap_are_left_out(tmp_path):
    """As under the other readings (``test_uncompared``): a record without bbox ranked
    101st in its image and class is never read by pycocotools 2.0.11."""
    flood = [det(10 + i, 3, 2, 0.5 - i / 1000, (i % 50, 5, 40, 40)) for i in range(100)]
    dets = [HEAD, *flood, {"id": 999, "image_id": 3, "category_id": 2, "score": 0.01}]
    _scores_as_pycocotools(tmp_path, dets, uncompared_unfit=1)


# (second result, field named, what pycocotools 2.0.11 raises)
_REFUSED = [
    ({"image_id": 1, "category_id": 1, "score": 0.9, "bbox": [1, 1, 5, 5], "area": 25}, "id",
     KeyError),
    ({**det([1], 1, 1, 0.9)}, "id", TypeError),
    ({**det({"a": 1}, 1, 1, 0.9)}, "id", TypeError),
    ({"id": 3, "image_id": 1, "category_id": 1, "score": 0.9, "area": 25}, "bbox", KeyError),
    ({"id": 3, "image_id": 1, "category_id": 1, "score": 0.9, "bbox": [1, 1, 5, 5]}, "area",
     KeyError),
    ({**det(3, 1, 1, 0.9), "area": "25"}, "area", TypeError),
    ({**det(3, 1, 1, 0.9), "bbox": []}, "bbox", Exception),
    ({**det("a", 1, 1, 0.9)}, "id", ValueError),  # matched: numpy cannot write "a"
]  # fmt: skip


@pytest.mark.parametrize(("second", "field", "raises"), _REFUSED)
def test_what_pycocotools_raises_on_is_refused(tmp_path, capsys, second, field, raises):
    """pycocotools 2.0.11 raises as listed (run); refused naming file, record 1 and
    field (by the load, or by ``match`` for an id numpy cannot write when its detection
    matches a box), and ``python -m evaluation.engine score`` exits 2 without a
    traceback."""
    from evaluation.engine.__main__ import main

    gt, dt = _files(tmp_path, _SPLIT, [HEAD, second])
    with pytest.raises(raises):
        pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    with pytest.raises(InputError) as error:
        evaluate(truth, load_predictions(dt, truth), "coco")
    assert error.value.record == "record 1" and error.value.field == field
    assert main(["score", "--truth", str(gt), "--predictions", str(dt)]) == 2
    err = capsys.readouterr().err
    assert str(dt) in err and "record 1" in err and field in err and "Traceback" not in err


@pytest.mark.parametrize("shards", [None, 1])
def test_an_unwritable_id_matters_only_on_a_match(tmp_path, shards):
    """pycocotools 2.0.11 raises on an id numpy cannot write into ``gtm`` ("x") only
    when its detection matches a box: compared but matching nothing, the file scores
    (run: equal numbers; under ``voc`` too, which reads no ids); matching box 4, it is
    refused under ``coco`` naming record 2 and ``id`` (pycocotools: ValueError) — in a
    sharded run as well."""
    from evaluation.engine import match

    from .test_shards import _sharded

    unmatched = det("x", 2, 2, 0.9, (0, 0, 5, 5))
    _scores_as_pycocotools(tmp_path, [HEAD, det(3, 1, 1, 0.8), unmatched])
    matched = det("x", 2, 2, 0.9, (50, 50, 30, 30))
    gt, dt = _files(tmp_path, _SPLIT, [HEAD, det(3, 1, 1, 0.8), matched])
    with pytest.raises(ValueError):
        pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    assert predictions.unwritable.tolist() == [-1, 2]
    evaluate(truth, predictions, "voc")
    with pytest.raises(InputError) as error:
        if shards:
            _sharded(truth, predictions, "coco", shards, tmp_path)
        else:
            match(truth, predictions, "coco")
    assert error.value.record == "record 2" and error.value.field == "id"


def _mixed(seed):
    """Random results read as given: ids from a small pool (repeats), 0, negative,
    NaN, null and text numbers among them, boxes near the truth, own areas."""
    rng = np.random.default_rng(seed)
    pool = [1, 2, 3, 4, 0, -1, float("nan"), None, "5", 6.0, True, "x"]
    out = [dict(HEAD, id=pool[int(rng.integers(len(pool)))])]
    for _ in range(int(rng.integers(1, 30))):
        truth_box = _SPLIT["annotations"][int(rng.integers(5))]
        x, y, w, h = (v + float(rng.normal(0, 3)) for v in truth_box["bbox"])
        category = int(rng.choice([1, 2, 2, 9])) if rng.random() < 0.3 else truth_box["category_id"]
        id_ = pool[int(rng.integers(len(pool)))] if rng.random() < 0.6 else int(rng.integers(7, 99))
        area = float(w * h * rng.choice([1.0, 0.01, 10.0]))
        score = float(rng.choice([0.5, rng.random()]))
        out.append(det(id_, truth_box["image_id"], category, score, (x, y, w, h), area))
    return out


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(st.integers(0, 2**32 - 1))
def test_mixed_files_score_as_pycocotools(tmp_path, seed):
    """Repeated, free and odd ids mixed at random: every number equals pycocotools
    2.0.11's on the same files; where it raises (an id "x" on a matching detection),
    the file is refused naming that field."""
    detections = _mixed(seed)
    gt, dt = _files(tmp_path, _SPLIT, detections)
    truth = load_truth(gt)
    try:
        evaluate(truth, load_predictions(dt, truth), "coco")
    except InputError as error:
        assert error.field == "id"
        with pytest.raises(ValueError):
            pycocotools_eval(gt, dt)
        return
    _compare(tmp_path, _SPLIT, detections)


def test_every_path_agrees(tmp_path, monkeypatch):
    """Whole, tiny slices, validated first, cached, streamed into pieces (read whole:
    ids reach across the file) and sharded runs give the same columns, counts and
    records as the whole load."""
    from evaluation.engine import match, shards

    from .load_paths import COLUMNS, every_path_agrees
    from .test_shards import FIELDS, _scorecard, _sharded

    dets = [HEAD, det(7, 2, 1, 0.3), det(0, 1, 1, 0.9), det(7, 1, 1, 0.95, (11, 11, 20, 20)),
            det(-1, 3, 2, 0.6, (5, 5, 40, 41)), det(9, 3, 2, 0.5, (6, 5, 40, 40)),
            det("x", 3, 2, 0.4, (80, 80, 5, 5))]  # fmt: skip
    gt, dt = _files(tmp_path, _SPLIT, dets)
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    assert whole.free is not None and whole.box_counts["replaced_by_id"] == 1
    assert whole.unwritable.tolist() == [-1] * 5 + [6]
    columns = (*COLUMNS, "free", "unwritable")
    every_path_agrees(tmp_path, monkeypatch, dt, truth, whole, 90, columns)
    for protocol in ("coco", "voc"):
        single = match(truth, whole, protocol)
        (tmp_path / protocol).mkdir()
        merged, _ = _sharded(truth, whole, protocol, 1, tmp_path / protocol)
        for name in FIELDS:
            a, b = getattr(single, name), getattr(merged, name)
            same = a.tobytes() == b.tobytes() if isinstance(a, np.ndarray) else a == b
            assert same, name
        card = _scorecard(merged, truth, shards.PredictionCounts.of(whole), protocol)
        assert card == _scorecard(single, truth, whole, protocol)
    reference = pycocotools_eval(gt, dt)
    result = evaluate(truth, whole, "coco")
    assert result["summary"]["AP"] == pytest.approx(reference.stats[0], abs=1e-12)
    assert json.loads(json.dumps(result["counts"]))["boxes"]["predictions"]["free_id"] == 2
    assert as_given.REPLACED in result["counts"]["boxes"]["predictions"]
