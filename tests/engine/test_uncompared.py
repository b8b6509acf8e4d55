"""Records pycocotools 2.0.11 never compares may hold what it cannot read.

``COCOeval.computeIoU``/``evaluateImg`` read a detection's ``bbox`` and ``area`` only
among the first 100 by score of its (image, category), and only for categories the
split lists; ``loadRes`` reads the keypoints of every result, and of a box-reading
file only ``bbox[0..3]``. So under the caption, mask, keypoints and box readings a bad
bbox or area (a box of 5 numbers, nested lists, text whose area is text; keypoints
whose extent is an integer beyond float64) on a never-compared detection leaves the file
scorable there. Each case is run through pycocotools 2.0.11 (``pycocotools_eval``):
where it scores the file, every summary number and per-class AP equal its numbers
(``test_coco_reference._compare``) and the left-out detections are counted; where it
raises (the detection is compared), the file is refused naming file, record and field,
through the CLI too (exit 2, no traceback). Whole, sliced, validated-first, streamed
into pieces and cached loads agree.
"""

import contextlib
import io
import json
import shutil

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.loaders import uncompared

from .conftest import pycocotools_eval
from .load_paths import every_path_agrees
from .test_coco_reference import _compare
from .test_mask_results import _files, _rect

_SPLIT = {
    "images": [{"id": 1, "width": 40, "height": 30}, {"id": 2, "width": 40, "height": 30}],
    "annotations": [
        {
            "id": 1,
            "image_id": 1,
            "category_id": 1,
            "bbox": [2, 3, 10, 8],
            "area": 80.0,
            "iscrowd": 0,
        },
        {
            "id": 2,
            "image_id": 1,
            "category_id": 1,
            "bbox": [20, 5, 12, 9],
            "area": 108.0,
            "iscrowd": 0,
        },
        {
            "id": 3,
            "image_id": 2,
            "category_id": 2,
            "bbox": [5, 5, 8, 8],
            "area": 64.0,
            "iscrowd": 0,
        },
    ],
    "categories": [{"id": 1, "name": "car"}, {"id": 2, "name": "van"}],
}

_MASK = _rect(30, 40, 3, 2, 8, 10)


def _good(reading, i, score, image=1, category=1):
    """A readable detection of ``reading`` near a truth box, shifted by ``i``."""
    x, y = 2 + i % 7, 3 + i % 5
    record = {"image_id": image, "category_id": category, "score": score}
    if reading == "caption":
        record.update(caption="a car", bbox=[x, y, 10, 8], area=80.0 - i % 3)
    elif reading == "mask":
        record.update(segmentation=_rect(30, 40, y, x, 8, 10))
    elif reading == "box":
        record.update(bbox=[x, y, 10, 8])
    else:
        record.update(keypoints=[x, y, 2, x + 10, y + 8, 1])
    return record


def _flood(reading, n=100, score=0.5):
    """``n`` readable detections of image 1, class car: a full per-image cap."""
    return [_good(reading, i, score - i * 1e-4) for i in range(n)]


# (reading, fields of the bad record that replace its readable ones, field named)
_BAD = [
    ("caption", {"bbox": None}, "bbox"),  # None: the key is removed
    ("caption", {"area": None}, "area"),
    ("caption", {"area": "80"}, "area"),
    ("caption", {"bbox": [1, 2]}, "bbox"),
    ("caption", {"bbox": "1 2 3 4"}, "bbox"),
    ("mask", {"bbox": [1, 2]}, "bbox"),
    ("mask", {"bbox": "1 2 3 4"}, "bbox"),
    ("mask", {"bbox": []}, "bbox"),
    ("mask", {"segmentation": [_MASK, _MASK], "bbox": [2, 3, 10, 8]}, "segmentation"),
    ("mask", {"segmentation": [_MASK]}, "segmentation"),  # toBbox gives an array box
    # a list of one mask with a bbox: scored beside its own kind (test_one_mask_lists)
    ("mask", {"segmentation": [], "bbox": [2, 3, 10, 8]}, "segmentation"),
    # box reading: loadRes adds and multiplies bb[0..3] only (box_results)
    ("box", {"bbox": [2, 3, 10, 8, 5]}, "bbox"),  # iou: "bounding box (Nx4)" Exception
    ("box", {"bbox": [2, 3, 10, 8, None]}, "bbox"),
    ("box", {"bbox": ["2", 3, "10", 8]}, "bbox"),  # area "10"*8: text < number, TypeError
    ("box", {"bbox": [2, "3", 10, "8"]}, "bbox"),
    ("box", {"bbox": [[2], 3, [10], 8]}, "bbox"),  # np.array: ValueError
    ("box", {"bbox": ["a", 3, "b", 8]}, "bbox"),  # float("a"): ValueError
    # keypoints whose extent loadRes computes in Python integers beyond float64:
    # computeIoU's np.array(..., dtype=np.double) raises OverflowError there
    ("keypoints", {"keypoints": [2**1100, 2**70, 2, 1, 1, 1]}, "keypoints"),
]


def _bad(reading, changes, score, image=1, category=1):
    record = _good(reading, 3, score, image, category)
    for key, value in changes.items():
        if value is None:
            record.pop(key)
        else:
            record[key] = value
    return record


def _where(tmp_path, name):
    path = tmp_path / name
    path.mkdir()
    return path


def _compare_allowing_wrap(tmp_path, detections):
    """``_compare``; where keypoints reach 2^62, overflow is no error (see below)."""
    wraps = any(
        type(v) is int and abs(v) >= 2**62 for d in detections for v in d.get("keypoints", [])
    )
    with np.errstate(over="ignore" if wraps else "raise"):
        _compare(tmp_path, _SPLIT, detections)


def _scores_as_pycocotools(tmp_path, detections, left_out):
    """Every summary number and per-class AP equal pycocotools 2.0.11's (``_compare``
    runs it on the same two files); ``left_out`` detections counted as uncompared.
    Keypoints of magnitude 2^62 overflow int64 in pycocotools' ``loadRes`` (a warning
    there, not an error): then overflow is let pass, in the engine too."""
    _compare_allowing_wrap(tmp_path, detections)
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "predictions.json", truth)
    assert predictions.box_counts.get(uncompared.COUNT, 0) == left_out
    return predictions


@pytest.mark.parametrize(("reading", "changes", "field"), _BAD)
def test_beyond_the_cap_the_file_scores_as_pycocotools(tmp_path, reading, changes, field):
    """The bad record ranks 101st in its image and class (lowest score): pycocotools
    2.0.11 never reads its bbox or area, and scores the file; so do we, leaving it out."""
    detections = [_good(reading, 0, 0.9, image=2, category=2), *_flood(reading)]
    detections.append(_bad(reading, changes, 0.01))
    predictions = _scores_as_pycocotools(tmp_path, detections, left_out=1)
    assert len(predictions) == 101


@pytest.mark.parametrize(("reading", "changes", "field"), _BAD)
def test_of_an_unlisted_class_the_file_scores_as_pycocotools(tmp_path, reading, changes, field):
    """The bad record's category (7) is not in the split: pycocotools 2.0.11 never
    evaluates it; it is dropped with its class (``dropped``), as any such record."""
    detections = [_good(reading, 0, 0.9), _bad(reading, changes, 0.95, category=7)]
    predictions = _scores_as_pycocotools(tmp_path, detections, left_out=0)
    assert predictions.dropped == 1 and predictions.dropped_classes == ("7",)


@pytest.mark.parametrize(("reading", "changes", "field"), _BAD)
def test_compared_it_is_refused_where_pycocotools_raises(tmp_path, reading, changes, field):
    """The bad record is within the cap: pycocotools 2.0.11 raises on its bbox or area;
    refused naming file, record 2 and the field; the CLI exits 2 with them and no
    traceback."""
    from evaluation.engine.__main__ import main

    detections = [_good(reading, 0, 0.9), _good(reading, 1, 0.8), _bad(reading, changes, 0.5)]
    gt, dt = _files(tmp_path, _SPLIT, detections)
    with pytest.raises(Exception):  # noqa: B017 - KeyError, TypeError, Exception
        pycocotools_eval(gt, dt)
    with pytest.raises(InputError) as error:
        load_predictions(dt, load_truth(gt))
    assert error.value.record == "record 2" and error.value.field == field
    assert main(["score", "--truth", str(gt), "--predictions", str(dt)]) == 2


def test_the_cli_names_file_record_and_field(tmp_path, capsys):
    """``python -m evaluation.engine score`` on a compared caption record without area."""
    from evaluation.engine.__main__ import main

    detections = [_good("caption", 0, 0.9), _bad("caption", {"area": None}, 0.5)]
    gt, dt = _files(tmp_path, _SPLIT, detections)
    assert main(["score", "--truth", str(gt), "--predictions", str(dt)]) == 2
    err = capsys.readouterr().err
    assert str(dt) in err and "record 1" in err and "area" in err and "Traceback" not in err


@pytest.mark.parametrize("position", ["first", "last"])
def test_ties_at_the_cap_follow_file_order(tmp_path, position):
    """101 detections of one score: pycocotools 2.0.11's mergesort keeps file order, so
    the record written last is the one beyond the cap (scored, left out) and the one
    written first is compared (pycocotools raises KeyError: refused)."""
    flood = [dict(d, score=0.5) for d in _flood("caption")]
    bad = _bad("caption", {"bbox": None}, 0.5)
    detections = [bad, *flood] if position == "first" else [*flood, bad]
    if position == "last":
        _scores_as_pycocotools(tmp_path, detections, left_out=1)
        return
    gt, dt = _files(tmp_path, _SPLIT, detections)
    with pytest.raises(KeyError):
        pycocotools_eval(gt, dt)
    with pytest.raises(InputError) as error:
        load_predictions(dt, load_truth(gt))
    assert error.value.record == "record 0" and error.value.field == "bbox"


def test_a_nan_score_ranks_last(tmp_path):
    """A NaN score (Python's json reads the literal) sorts last in pycocotools 2.0.11's
    ``np.argsort(-score)``: with 100 others, such a record is beyond the cap."""
    bad = _bad("caption", {"area": "big"}, 0.5)
    text = json.dumps([bad, *_flood("caption")]).replace('"score": 0.5,', '"score": NaN,', 1)
    (tmp_path / "predictions.json").write_text(text)
    (tmp_path / "truth.json").write_text(json.dumps(_SPLIT))
    reference = pycocotools_eval(tmp_path / "truth.json", tmp_path / "predictions.json")
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "predictions.json", truth)
    assert predictions.box_counts[uncompared.COUNT] == 1
    from evaluation.engine import evaluate

    result = evaluate(truth, predictions, "coco")
    assert result["summary"]["AP"] == pytest.approx(reference.stats[0], abs=1e-12)


def test_masks_in_a_list_pycocotools_cannot_read_are_refused_anywhere(tmp_path):
    """``loadRes``' ``maskUtils.area`` reads every mask of a list, on every result:
    one without counts (KeyError), polygons among them (TypeError) are refused even on
    a record of an unlisted class."""
    for seg, raises in (([{"size": [30, 40]}], KeyError), ([_MASK, [1, 2, 3, 4]], TypeError)):
        bad = {**_good("mask", 1, 0.5, category=7), "segmentation": seg, "bbox": [1, 1, 2, 2]}
        gt, dt = _files(tmp_path, _SPLIT, [_good("mask", 0, 0.9), bad])
        with pytest.raises(raises):
            pycocotools_eval(gt, dt)
        with pytest.raises(InputError) as error:
            load_predictions(dt, load_truth(gt))
        assert error.value.record == "record 1" and error.value.field.startswith("segmentation")


def test_keypoints_pycocotools_cannot_read_are_refused_anywhere(tmp_path):
    """``loadRes`` runs ``np.min``/``np.max`` on every result's keypoints: ragged nested
    lists (ValueError) and integers numpy cannot convert (OverflowError) raise there
    even on a record of an unlisted class; refused naming it."""
    for kp, raises in (([[1, 2], 3, 2, [5], 4, 1], ValueError), ([2**70, 3, 2, 1, 4, 1], None)):
        detections = [_good("keypoints", 0, 0.9), _bad("keypoints", {"keypoints": kp}, 0.5)]
        detections[1]["category_id"] = 7
        gt, dt = _files(tmp_path, _SPLIT, detections)
        with pytest.raises(raises or OverflowError):
            pycocotools_eval(gt, dt)
        with pytest.raises(InputError) as error:
            load_predictions(dt, load_truth(gt))
        assert error.value.record == "record 1" and error.value.field == "keypoints"


def _mixed(reading, seed):
    """A file of ``reading`` with floods of 99..115 detections on two images, bad
    records at random ranks and in an unlisted class."""
    rng = np.random.default_rng(seed)
    out = [_good(reading, 0, 0.99, image=2, category=2)]
    changes = [c for r, c, _ in _BAD if r == reading]
    for image, category in ((1, 1), (2, 2), (1, 2)):
        n = int(rng.integers(99, 116))
        for i in range(n):
            score = float(rng.choice([0.5, 0.25, rng.random()]))
            if rng.random() < 0.02:  # mostly ranked last: compared only in a small flood
                low = float(rng.random() * 0.01) if rng.random() < 0.95 else score
                bad = _bad(reading, changes[int(rng.integers(len(changes)))], low)
                out.append(dict(bad, image_id=image, category_id=category))
            else:
                out.append(_good(reading, i, score, image, category))
    out.append(_bad(reading, changes[0], 0.7, category=9))
    return out


@settings(
    max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(st.sampled_from(["caption", "mask", "keypoints", "box"]), st.integers(0, 2**32 - 1))
def test_mixed_files_score_or_refuse_as_pycocotools(tmp_path, reading, seed):
    """Random floods with bad records anywhere: where pycocotools 2.0.11 scores the
    file, the same numbers; where it raises, refused naming a record and field."""
    detections = _mixed(reading, seed)
    gt, dt = _files(tmp_path, _SPLIT, detections)
    truth = load_truth(gt)
    try:
        predictions = load_predictions(dt, truth)
    except InputError as error:
        assert error.record and error.field
        with pytest.raises(Exception):  # noqa: B017 - KeyError, TypeError, Exception
            pycocotools_eval(gt, dt)
        return
    _compare_allowing_wrap(tmp_path, detections)
    assert predictions.box_counts.get(uncompared.COUNT, 0) + len(predictions) + 1 == len(detections)


@pytest.mark.parametrize("reading", ["caption", "mask", "keypoints", "box"])
def test_every_path_agrees(tmp_path, monkeypatch, reading):
    """Whole, tiny slices, validated first, streamed into pieces and cached: the same
    columns and counts (left-out records included) as the whole load."""
    detections = [*_flood(reading), _bad(reading, [c for r, c, _ in _BAD if r == reading][0], 0)]
    detections += [_good(reading, i, 0.3, image=2, category=2) for i in range(3)]
    gt, dt = _files(tmp_path, _SPLIT, detections)
    whole = _every_path_agrees(tmp_path, monkeypatch, gt, dt)
    assert whole.box_counts[uncompared.COUNT] == 1


def _every_path_agrees(tmp_path, monkeypatch, gt, dt):
    """The whole load of ``dt``; a cached load, tiny slices, validated first and the
    streamed pieces give its columns and counts."""
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    every_path_agrees(tmp_path, monkeypatch, dt, truth, whole, 700)
    return whole


# Integer scores of magnitude >= 2**53 (``loaders.exact_scores``): pycocotools 2.0.11
# keeps them as Python ints, and ``evaluateImg``'s ``np.argsort([-d['score'] ...],
# kind='mergesort')`` ranks an image's list exactly (int64 here), where float64 ties
# 2**60 + k for k < 101 in file order. So the cap follows the exact order: 101 such
# detections in ascending file order are ranked in reverse (audit case U_exact_cap).
_BIG = 2**60
# (reading, change making the record unfit, field named)
_EXACT = [
    ("box", {"bbox": [2, 3, 10, 8, 5]}, "bbox"),  # iou: "bounding box (Nx4)" Exception
    ("caption", {"area": "big"}, "area"),  # evaluateImg: "big" < number, TypeError
    ("given", {"bbox": [2, 3, 10]}, "bbox"),  # iou: "bounding box (Nx4)" Exception
]


def _ascending(reading, changes, bad_at, mixed=False):
    """101 detections of image 1, class car, scored 2**60 + k in file order, the one
    at ``bad_at`` unfit; ``mixed``: one score written as a float (2.0**61), which
    makes numpy's list float64, so ties in file order again (pycocotools' own call).
    Read as given (``given``): each its own id, after a first result of an unlisted
    class with an empty bbox (``as_given``)."""
    kind = "caption" if reading == "given" else reading
    out = [_good(kind, k, _BIG + k) for k in range(101)]
    out[bad_at] = _bad(kind, changes, _BIG + bad_at)
    if mixed:
        out[50]["score"] = 2.0**61
    if reading != "given":
        return out
    out = [
        {k: v for k, v in d.items() if k != "caption"} | {"id": i + 1} for i, d in enumerate(out)
    ]
    return [{"id": 1000, "image_id": 1, "category_id": 9, "bbox": [], "score": 0.1}, *out]


def _refused_as_pycocotools(tmp_path, monkeypatch, detections, record, field):
    """pycocotools 2.0.11 raises on the file; every load path (whole, cached, tiny
    slices, streamed pieces) refuses it naming ``record`` and ``field``, and the CLI
    exits 2 naming file, record and field, no traceback."""
    from evaluation.engine.__main__ import main
    from evaluation.engine.loaders import results_stream
    from evaluation.engine.pieces import stream_pieces
    from evaluation.engine.shards import plan

    gt, dt = _files(tmp_path, _SPLIT, detections)
    with pytest.raises(Exception):  # noqa: B017 - TypeError, Exception (Nx4)
        pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    loads = [
        lambda: load_predictions(dt, truth),
        lambda: load_predictions(dt, truth, cache_dir=_where(tmp_path, "cache")),
        lambda: stream_pieces(dt, truth, plan(truth.n_images, 1), _where(tmp_path, "pieces")),
    ]
    for small in (False, True):
        if small:
            monkeypatch.setattr(results_stream, "CHUNK_BYTES", 700)
        for load in loads:
            with pytest.raises(InputError) as error:
                load()
            assert (error.value.record, error.value.field) == (f"record {record}", field)
            for name in ("cache", "pieces"):
                shutil.rmtree(tmp_path / name, ignore_errors=True)
    err = io.StringIO()
    with contextlib.redirect_stderr(err):
        assert main(["score", "--truth", str(gt), "--predictions", str(dt)]) == 2
    assert str(dt) in err.getvalue() and f"record {record}" in err.getvalue()
    assert f"'{field}'" in err.getvalue() and "Traceback" not in err.getvalue()


@pytest.mark.parametrize(("reading", "changes", "field"), _EXACT)
def test_exact_integer_scores_leave_out_the_last_by_exact_rank(
    tmp_path, monkeypatch, reading, changes, field
):
    """The unfit record is written first: float64 ranks it first, pycocotools 2.0.11
    ranks it 101st (the smallest integer), never compares it and scores the file;
    equal numbers (``_compare``), the record left out and counted, on every load path,
    and the exact order kept for scoring (``score_conflicts``). The same file with the
    scores written as the float64 the engine reads makes pycocotools raise."""
    detections = _ascending(reading, changes, bad_at=0)
    as_floats = [{**d, "score": float(d["score"])} for d in detections]
    gt, dt = _files(tmp_path, _SPLIT, as_floats)
    with pytest.raises(Exception):  # noqa: B017 - TypeError, Exception (Nx4)
        pycocotools_eval(gt, dt)
    gt, dt = _files(tmp_path, _SPLIT, detections)
    predictions = _scores_as_pycocotools(tmp_path, detections, left_out=1)
    assert len(predictions) == 100 and predictions.score_conflicts["100"]
    _every_path_agrees(tmp_path, monkeypatch, gt, dt)


@pytest.mark.parametrize(("reading", "changes", "field"), _EXACT)
def test_exact_integer_scores_compare_the_first_by_exact_rank(
    tmp_path, monkeypatch, reading, changes, field
):
    """The unfit record is written last: float64 ranks it 101st (file order), pycocotools
    2.0.11 ranks it first (the largest integer) and raises on it: refused naming it."""
    detections = _ascending(reading, changes, bad_at=100)
    record = 101 if reading == "given" else 100  # the first result of class 9 is record 0
    _refused_as_pycocotools(tmp_path, monkeypatch, detections, record, field)


@pytest.mark.parametrize(("reading", "changes", "field"), _EXACT)
def test_a_float_among_them_makes_the_list_float64(tmp_path, monkeypatch, reading, changes, field):
    """One score written as a float: numpy makes the image's list float64 in pycocotools
    2.0.11, the integers tie there, file order decides: the first record (unfit) is
    compared (raises, refused), and written last it is left out (scored)."""
    detections = _ascending(reading, changes, bad_at=0, mixed=True)
    record = 1 if reading == "given" else 0
    _refused_as_pycocotools(tmp_path, monkeypatch, detections, record, field)
    _scores_as_pycocotools(tmp_path, _ascending(reading, changes, 100, mixed=True), left_out=1)


@pytest.mark.parametrize("elsewhere", [False, True])
def test_without_such_scores_the_groups_are_not_read_again(tmp_path, monkeypatch, elsewhere):
    """The exact ranks cost a loose read (``exact_scores._affected``) only where a group
    holding an unfit record holds a score of magnitude >= 2**53: none here, so the
    file is read loosely only by the replay of the class holding one (``elsewhere``:
    on image 2, class van), or not at all."""
    from evaluation.engine.loaders import exact_scores

    calls, affected = [], exact_scores._affected
    monkeypatch.setattr(exact_scores, "_affected", lambda *a: calls.append(a) or affected(*a))
    detections = [*_flood("box"), _bad("box", _EXACT[0][1], 0.0)]
    if elsewhere:
        detections.append(_good("box", 0, _BIG, image=2, category=2))
    gt, dt = _files(tmp_path, _SPLIT, detections)
    predictions = load_predictions(dt, load_truth(gt))
    assert predictions.box_counts[uncompared.COUNT] == 1
    assert [list(classes) for _, _, classes, _ in calls] == ([[1]] if elsewhere else [])
