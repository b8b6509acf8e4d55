"""Results files read by their first result's caption or keypoints key, against
pycocotools 2.0.11 (``COCO.loadRes``, then ``COCOeval(..., 'bbox')``): every summary
number and per-class AP equal on random files; whole-file, streamed, sharded and
cached loads equal; what pycocotools refuses is refused naming file, record and field.
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, evaluate, load_predictions, load_truth
from evaluation.engine.provenance import protocol_record

from .conftest import pycocotools_eval
from .synthetic import make_detections, make_split
from .test_coco_reference import _compare
from .test_mask_results import _files, _small_split


def _split(rng, n_images=6, n_classes=3):
    return make_split(
        rng,
        n_images=n_images,
        n_classes=n_classes,
        boxes_per_image=4,
        width=int(rng.integers(60, 300)),
        height=int(rng.integers(60, 300)),
    )


def _caption_results(rng, split, false_per_image):
    """The first result has a caption key; every result its own bbox and an area
    unlike w*h (0.05..20 times it, some 0), so size ranges differ from the boxes'."""
    out = []
    for i, det in enumerate(make_detections(rng, split, false_per_image=false_per_image)):
        w, h = det["bbox"][2], det["bbox"][3]
        area = float(w * h * rng.choice([0.0, 0.05, 0.5, 3.0, 20.0]) * rng.random())
        if rng.random() < 0.2:
            area = int(area)  # an integer area reads alike
        record = {**det, "area": area}
        if i == 0 or rng.random() < 0.3:
            record["caption"] = "a parked car" if i == 0 else None
        out.append(record)
    return out


def _keypoint_results(rng, split, false_per_image, given_boxes, odd_lengths):
    """Keypoints spread around each detection's box (some of visibility 0 far
    outside it: they count too); some results give a bbox of their own (never the
    first: it would make the file one of boxes), replaced by the keypoints' extent."""
    out = []
    for i, det in enumerate(make_detections(rng, split, false_per_image=false_per_image)):
        x, y, w, h = det["bbox"]
        k = int(rng.integers(1, 8))
        px = x + rng.random(k) * max(w, 1)
        py = y + rng.random(k) * max(h, 1)
        vis = rng.integers(0, 3, k)
        far = (vis == 0) & (rng.random(k) < 0.5)
        px[far] += rng.normal(0, 40, far.sum())
        kp = np.stack([px, py, vis]).T.ravel().tolist()
        kp[2::3] = [int(v) for v in vis]
        if rng.random() < 0.2:
            kp = [int(round(v)) for v in kp]  # integer keypoints: int64 in numpy there
        if odd_lengths and rng.random() < 0.3:
            kp = kp[: max(2, len(kp) - int(rng.integers(1, 3)))]  # no multiple of 3
        record = {"image_id": det["image_id"], "category_id": det["category_id"]}
        record.update(keypoints=kp, score=det["score"])
        if i and rng.random() < given_boxes:
            record["bbox"] = [float(v) for v in rng.random(4) * 50]
        out.append(record)
    return out


scenarios = st.fixed_dictionaries(
    {
        "seed": st.integers(0, 2**32 - 1),
        "n_images": st.integers(1, 8),
        "n_classes": st.integers(1, 4),
        "false": st.sampled_from([0.0, 3.0]),
        "given_boxes": st.sampled_from([0.0, 0.4]),
        "odd_lengths": st.booleans(),
    }
)

_SETTINGS = settings(
    max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)


@_SETTINGS
@given(scenarios)
def test_caption_files_score_as_pycocotools(tmp_path, scenario):
    """Every summary number and per-class AP/AP50/AP75/recall (and per size bucket)
    equal pycocotools 2.0.11's on a file whose first result has a caption key: each
    result's own area sorts it into size ranges."""
    rng = np.random.default_rng(scenario["seed"])
    split = _split(rng, scenario["n_images"], scenario["n_classes"])
    detections = _caption_results(rng, split, scenario["false"])
    if not detections:
        return
    _compare(tmp_path, split, detections)
    predictions = load_predictions(
        tmp_path / "predictions.json", load_truth(tmp_path / "truth.json")
    )
    assert predictions.box_counts["given_area"] == len(predictions)


@_SETTINGS
@given(scenarios)
def test_keypoint_files_score_as_pycocotools(tmp_path, scenario):
    """As above for a file whose first result has keypoints and no bbox: boxes and
    areas are the keypoints' extent (given boxes replaced), as pycocotools 2.0.11."""
    rng = np.random.default_rng(scenario["seed"])
    split = _split(rng, scenario["n_images"], scenario["n_classes"])
    detections = _keypoint_results(
        rng, split, scenario["false"], scenario["given_boxes"], scenario["odd_lengths"]
    )
    if not detections:
        return
    _compare(tmp_path, split, detections)
    predictions = load_predictions(
        tmp_path / "predictions.json", load_truth(tmp_path / "truth.json")
    )
    assert predictions.box_counts["keypoint_area"] == len(predictions)


def _file(tmp_path, reading, seed=15):
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=30, n_classes=3, boxes_per_image=3, width=120, height=90)
    if reading == "caption":
        dets = _caption_results(rng, split, 3.0)
    else:
        dets = _keypoint_results(rng, split, 3.0, 0.4, True)
    return _files(tmp_path, split, dets)


_SOURCE = {"caption": "own area and bbox as given", "keypoints": "keypoints' extent"}
_COUNT = {"caption": "given_area", "keypoints": "keypoint_area"}


@pytest.mark.parametrize("reading", ["caption", "keypoints"])
def test_area_source_recorded(tmp_path, reading):
    """The protocol record names the reading; the count is in ``box_counts``."""
    from evaluation.engine.matching import match

    gt, dt = _file(tmp_path, reading)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    result = evaluate(truth, predictions, "coco")
    assert result["summary"]["AP"] == pytest.approx(pycocotools_eval(gt, dt).stats[0], abs=1e-12)
    records = match(truth, predictions, "coco")
    record = protocol_record("coco", truth, predictions, records, result)
    assert _SOURCE[reading] in record["area_source"]["predictions"]
    assert predictions.box_counts[_COUNT[reading]] == len(predictions)


@pytest.mark.parametrize("reading", ["caption", "keypoints"])
@pytest.mark.parametrize("images_per_shard", [1, 7, 30])
def test_streamed_pieces_equal_the_whole_files(tmp_path, monkeypatch, reading, images_per_shard):
    """Read a few records at a time (tiny slices), the pieces carry the same areas
    and boxes, bit for bit, as the whole load's pieces."""
    from evaluation.engine.loaders import results_stream

    from .test_stream_pieces import _compare as compare_pieces

    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 1024)
    gt, dt = _file(tmp_path, reading)
    truth = load_truth(gt)
    predictions, reference = compare_pieces(dt, truth, images_per_shard, tmp_path)
    assert predictions.area is not None
    assert all(piece[2].area is not None for piece in reference)
    assert predictions.box_counts[_COUNT[reading]] == len(predictions)


@pytest.mark.parametrize("reading", ["caption", "keypoints"])
def test_blocks_and_a_validated_read_equal_the_whole_read(tmp_path, monkeypatch, reading):
    """A big file (validated first, then filled) and one read in many slices give the
    columns of a small-slice read, equal to pycocotools 2.0.11's numbers."""
    from evaluation.engine.loaders import coco_json, results_stream

    gt, dt = _file(tmp_path, reading)
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 512)
    monkeypatch.setattr(coco_json, "VALIDATE_FIRST_BYTES", 0)
    blocks = load_predictions(dt, truth)
    for name in ("image", "cls", "boxes", "score", "area"):
        assert getattr(whole, name).tobytes() == getattr(blocks, name).tobytes(), name
    assert whole.box_counts == blocks.box_counts


@pytest.mark.parametrize("reading", ["caption", "keypoints"])
@pytest.mark.parametrize("protocol", ["coco", "recall40", "voc"])
def test_sharded_run_equals_the_whole_run(tmp_path, reading, protocol):
    """Matched shard by shard and merged: every record field and the annotated
    scorecard (its area source too) equal the whole run's."""
    from evaluation.engine import match, shards

    from .test_shards import FIELDS, _scorecard, _sharded

    gt, dt = _file(tmp_path, reading)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    whole = match(truth, predictions, protocol)
    merged, _ = _sharded(truth, predictions, protocol, 7, tmp_path)
    for name in FIELDS:
        a, b = getattr(whole, name), getattr(merged, name)
        if isinstance(a, np.ndarray):
            assert a.dtype == b.dtype and a.tobytes() == b.tobytes(), name
        else:
            assert a == b, name
    card = _scorecard(merged, truth, shards.PredictionCounts.of(predictions), protocol)
    assert card == _scorecard(whole, truth, predictions, protocol)
    assert _SOURCE[reading] in card


@pytest.mark.parametrize("reading", ["caption", "keypoints"])
def test_cache_keeps_the_reading(tmp_path, reading):
    """A cached load gives the same areas, boxes and counts as a fresh one."""
    gt, dt = _file(tmp_path, reading)
    truth = load_truth(gt)
    cache = tmp_path / "cache"
    first = load_predictions(dt, truth, cache_dir=cache)
    again = load_predictions(dt, truth, cache_dir=cache)
    assert again.area.tobytes() == first.area.tobytes()
    assert again.boxes.tobytes() == first.boxes.tobytes()
    assert again.box_counts == first.box_counts


_FIRST = {
    "caption": {"caption": "x", "bbox": [2, 3, 10, 8], "area": 80},
    "keypoints": {"keypoints": [2, 3, 2, 12, 11, 2]},
}
# (reading, second result's fields, field named, pycocotools 2.0.11 raises)
_REFUSED = [
    ("caption", {"bbox": [2, 3, 10, 8]}, "area", KeyError),
    ("caption", {"bbox": [2, 3, 10, 8], "area": "80"}, "area", TypeError),
    ("caption", {"area": 80}, "bbox", KeyError),
    ("keypoints", {}, "keypoints", KeyError),
    ("keypoints", {"keypoints": []}, "keypoints", ValueError),
    ("keypoints", {"keypoints": [4]}, "keypoints", ValueError),
    ("keypoints", {"keypoints": [4, "5", 2]}, "keypoints", TypeError),
    ("keypoints", {"keypoints": [4, None, 2]}, "keypoints", TypeError),
    ("keypoints", {"keypoints": "4 5 2"}, "keypoints", TypeError),
]


@pytest.mark.parametrize(("reading", "fields", "field", "raises"), _REFUSED)
def test_what_pycocotools_refuses_is_refused(tmp_path, reading, fields, field, raises):
    """A second result pycocotools 2.0.11 cannot read in the first result's reading
    (its evaluation raises as listed) is refused naming file, record and field."""
    dets = [
        {"image_id": 1, "category_id": 1, "score": 0.9, **_FIRST[reading]},
        {"image_id": 1, "category_id": 1, "score": 0.5, **fields},
    ]
    gt, dt = _files(tmp_path, _small_split(), dets)
    with pytest.raises(raises):
        pycocotools_eval(gt, dt)
    with pytest.raises(InputError) as e:
        load_predictions(dt, load_truth(gt))
    assert e.value.record == "record 1" and e.value.field == field
    assert str(dt) in str(e.value)


def test_a_first_result_of_none_of_the_readings_compared_without_bbox(tmp_path):
    """A first result without caption, bbox (or with ``bbox: []``), segmentation and
    keypoints: pycocotools 2.0.11 reads every result as given (``test_as_given``); this
    one is compared and its bbox cannot be read (KeyError, or computeIoU's Exception
    on ``[]``: run): refused at record 0, field bbox."""
    for first in ({"area": 80, "id": 1}, {"bbox": [], "area": 80, "id": 1}):
        dets = [{"image_id": 1, "category_id": 1, "score": 0.9, **first}]
        gt, dt = _files(tmp_path, _small_split(), dets)
        with pytest.raises(Exception):  # noqa: B017 - KeyError or a plain Exception
            pycocotools_eval(gt, dt)
        with pytest.raises(InputError) as e:
            load_predictions(dt, load_truth(gt))
        assert e.value.record == "record 0" and e.value.field == "bbox"


def test_keypoints_replace_the_given_box(tmp_path):
    """Worked example (pycocotools 2.0.11 loadRes): keypoints (2, 3), (12, 11) and a
    visibility-0 point (30, 1) give bbox [2, 1, 28, 10] and area 280, whatever bbox
    the result gives."""
    dets = [
        {
            "image_id": 1,
            "category_id": 1,
            "score": 0.9,
            "keypoints": [2, 3, 2, 12, 11, 2, 30, 1, 0],
        },
        {
            "image_id": 1,
            "category_id": 1,
            "score": 0.5,
            "keypoints": [2, 3, 2],
            "bbox": [0, 0, 5, 5],
        },
    ]
    gt, dt = _files(tmp_path, _small_split(), dets)
    predictions = load_predictions(dt, load_truth(gt))
    assert predictions.boxes.tolist() == [[2.0, 1.0, 28.0, 10.0], [2.0, 3.0, 0.0, 0.0]]
    assert predictions.area.tolist() == [280.0, 0.0]
    res = pycocotools_eval(gt, dt).cocoDt
    assert [res.anns[i]["bbox"] for i in (1, 2)] == [[2, 1, 28, 10], [2, 3, 0, 0]]


@pytest.mark.parametrize("visibility", ["v", None, True, [1], 2**70])
def test_keypoint_visibilities_are_not_read(tmp_path, visibility):
    """pycocotools 2.0.11 loadRes reads only ``kp[0::3]`` and ``kp[1::3]``: whatever
    stands in the visibility places, the file scores as pycocotools scores it."""
    dets = [
        {"image_id": 1, "category_id": 1, "score": 0.9, "keypoints": [2, 3, 2, 12, 11, 2]},
        {
            "image_id": 1,
            "category_id": 1,
            "score": 0.5,
            "keypoints": [10, 10, visibility, 30, 30, visibility],
        },
    ]
    gt, dt = _files(tmp_path, _small_split(), dets)
    truth = load_truth(gt)
    result = evaluate(truth, load_predictions(dt, truth), "coco")
    reference = pycocotools_eval(gt, dt).stats
    assert result["summary"]["AP"] == pytest.approx(reference[0], abs=1e-12)
    assert result["summary"]["AR100"] == pytest.approx(reference[8], abs=1e-12)


def test_scores_beyond_2_53_in_a_keypoint_file(tmp_path):
    """The second, loose read of a file with scores >= 2**53 reads keypoints too."""
    gt, dt = _file(tmp_path, "keypoints")
    dets = json.loads(dt.read_text())
    dets[2]["score"], dets[5]["score"] = 2.0**60, 2**60 + 1
    dt.write_text(json.dumps(dets))
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    result = evaluate(truth, predictions, "coco")
    assert result["summary"]["AP"] == pytest.approx(pycocotools_eval(gt, dt).stats[0], abs=1e-12)


def test_the_cli_refuses_a_bad_keypoint_file(tmp_path, capsys):
    """``python -m evaluation.engine score``: exit 2 with file, record and field."""
    from evaluation.engine.__main__ import main

    gt, dt = _file(tmp_path, "keypoints")
    dets = json.loads(dt.read_text())
    dets[3]["keypoints"] = []
    dt.write_text(json.dumps(dets))
    assert main(["score", "--truth", str(gt), "--predictions", str(dt)]) == 2
    err = capsys.readouterr().err
    assert "record 3" in err and "keypoints" in err and "Traceback" not in err


def _with_null_in_box(reading, image):
    """A readable first result and one of image ``image``, class car, whose bbox holds
    a null (numpy's ``np.array(..., dtype=np.double)`` in computeIoU reads it as NaN)."""
    from .test_uncompared import _good

    own = {"bbox": [2, None, 10, 8]}
    if reading == "given":  # a first result of an unlisted class with bbox []: as given
        first = {"id": 1, "image_id": 1, "category_id": 9, "bbox": [], "score": 0.1}
        second = {**_good("caption", 1, 0.8, image=image), "id": 2, **own}
        second.pop("caption")
        return [first, _good("caption", 0, 0.9) | {"id": 3}, second]
    kind = "mask" if reading == "mask" else "caption"
    return [_good(kind, 0, 0.9), {**_good(kind, 1, 0.8, image=image), **own}]


@pytest.mark.parametrize("reading", ["caption", "given", "mask"])
@pytest.mark.parametrize("image", [1, 2])
def test_a_null_in_a_compared_box_is_nan(tmp_path, monkeypatch, reading, image):
    """pycocotools 2.0.11 scores the file (its box NaN matches nothing), with truth in
    that image and class (image 1) or none (image 2): the same numbers, on every load
    path; the box column holds NaN in its place."""
    from .load_paths import every_path_agrees
    from .test_uncompared import _SPLIT

    detections = _with_null_in_box(reading, image)
    _compare(tmp_path, _SPLIT, detections)
    gt, dt = _files(tmp_path, _SPLIT, detections)
    truth = load_truth(gt)
    whole = load_predictions(dt, truth, unknown_classes="drop")
    assert np.isnan(whole.boxes[-1, 1]) and not np.isnan(whole.boxes[-1, [0, 2, 3]]).any()
    if reading != "given":  # as given: read whole on every path (test_as_given)
        every_path_agrees(tmp_path, monkeypatch, dt, truth, whole, 200)
