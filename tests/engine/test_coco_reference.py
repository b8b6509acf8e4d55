"""The ``coco`` protocol against the reference implementation, pycocotools 2.0.11.

Every summary number and every per-class AP / AP50 / AP75 / recall must agree to
1e-9 (in practice they agree bit for bit) on randomised splits that exercise the
reference's edge conventions: tied scores, more than 100 detections per image and
class, crowd regions, annotation areas that differ from w*h, classes without ground
truth, images without detections, and detections of classes the split does not list —
and real-world files under the default box policy (``keep``): ground truth overhanging
the frame, detections overhanging it or lying wholly outside, zero-area boxes, boxes
of negative width and/or height in both files (corners swapped, or the sign flipped;
ground-truth area given positive or as the negative w*h), images without width/height,
ids beyond 2^53 and beyond signed 64 bits (positive and negative, in every id field),
and the literals NaN, Infinity and -Infinity (which Python's json
module, and so pycocotools, reads) in scores, box coordinates and areas.
"""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import COCO_SUMMARY_KEYS, evaluate, load_predictions, load_truth
from evaluation.engine.loaders.ids import as_written

from .conftest import as_reference, pycocotools_eval
from .synthetic import make_detections, make_split

TOLERANCE = 1e-9


def _compare(tmp_path, split, detections):
    gt_path = tmp_path / "truth.json"
    dt_path = tmp_path / "predictions.json"
    import json

    gt_path.write_text(json.dumps(split))
    dt_path.write_text(json.dumps(detections))
    reference = pycocotools_eval(gt_path, dt_path)
    truth = load_truth(gt_path)
    predictions = load_predictions(dt_path, truth, unknown_classes="drop")
    ours = evaluate(truth, predictions, "coco")

    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=TOLERANCE), key

    precision = reference.eval["precision"]  # [T, R, K, A, M]; -1 = absent
    recall = reference.eval["recall"]  # [T, K, A, M]
    # pycocotools' K axis is its params.catIds after np.unique, which may merge or drop
    # a category (test_unique_lost_ids): each class is found there by its id, as
    # pycocotools looks it up
    position = {c: k for k, c in enumerate(reference.params.catIds)}
    written = as_written(truth.class_ids, truth.class_id_type, None)
    lost = set(truth.unique_lost_classes.tolist())
    for j, name in enumerate(truth.classes):
        row = ours["per_class"][name]
        k = None if j in lost else position.get(written[j])
        if k is None:
            assert row["AP"] is None, name
            continue
        cls_precision = precision[:, :, k, 0, 2]
        if np.all(cls_precision == -1):
            assert row["AP"] is None and row["AP50"] is None and row["recall"] is None, name
            continue
        assert row["AP"] == pytest.approx(np.mean(cls_precision), abs=TOLERANCE), name
        assert row["AP50"] == pytest.approx(np.mean(cls_precision[0]), abs=TOLERANCE), name
        assert row["AP75"] == pytest.approx(np.mean(cls_precision[5]), abs=TOLERANCE), name
        assert row["recall"] == pytest.approx(np.mean(recall[:, k, 0, 2]), abs=TOLERANCE), name
        for a, bucket in enumerate(("small", "medium", "large"), start=1):
            expected = precision[:, :, k, a, 2]
            got = row[f"AP_{bucket}"]
            if np.all(expected == -1):
                assert got is None, (name, bucket)
            else:
                assert got == pytest.approx(np.mean(expected), abs=TOLERANCE), (name, bucket)
    return ours, reference


scenarios = st.fixed_dictionaries(
    {
        "seed": st.integers(0, 2**32 - 1),
        "n_images": st.integers(1, 25),
        "n_classes": st.integers(1, 6),
        "boxes_per_image": st.floats(0.0, 12.0),
        "crowd_rate": st.sampled_from([0.0, 0.1, 0.3]),
        "area_noise": st.sampled_from([0.0, 0.4]),
        "integer_coords": st.booleans(),
        "small_frame": st.booleans(),
        "hit_rate": st.floats(0.0, 1.0),
        "jitter": st.sampled_from([0.0, 0.05, 0.2]),
        "false_per_image": st.sampled_from([0.0, 2.0, 30.0, 250.0]),
        "duplicate_rate": st.floats(0.0, 0.6),
        "score_levels": st.sampled_from([None, 3, 20]),
        "extra_class_rate": st.sampled_from([0.0, 0.1]),
        "empty_images": st.integers(0, 3),
        "overhang_rate": st.sampled_from([0.0, 0.2, 0.5]),
        "outside_rate": st.sampled_from([0.0, 0.1]),
        "zero_area_rate": st.sampled_from([0.0, 0.1]),
        "negative_rate": st.sampled_from([0.0, 0.1, 0.3]),
        "sizeless_rate": st.sampled_from([0.0, 0.5, 1.0]),
        "big_ids": st.sampled_from([0, 2**53 + 1, 2**63, 2**64 + 7, -(2**70)]),
        "non_finite_rate": st.sampled_from([0.0, 0.0, 0.05, 0.3]),
    }
)

NON_FINITE = (float("nan"), float("inf"), -float("inf"))


def roughen(rng, split, detections, scenario):
    """Make the files real-world: boxes across and beyond the frame, zero-area boxes,
    negative sizes, images without sizes, huge ids. pycocotools accepts all of these."""
    frames = {im["id"]: (im["width"], im["height"]) for im in split["images"]}

    def move(box, frame, rate, outside_rate):
        x, y, w, h = box
        u = rng.random()
        if u < outside_rate:  # wholly outside: left of, or below, the frame
            return [-w - 5.0, y, w, h] if rng.random() < 0.5 else [x, frame[1] + 3.0, w, h]
        if u < outside_rate + rate:  # across an edge
            return [x - w / 2 if rng.random() < 0.5 else frame[0] - w / 3, y, w, h]
        return box

    def flatten(box):
        if rng.random() < scenario["zero_area_rate"]:
            box = list(box)
            box[2 + int(rng.integers(0, 2))] = 0.0
        return box

    def negate(box):
        """Negative width and/or height, as broken exporters write them: either the
        same corners listed the other way round, or the size's sign flipped."""
        if rng.random() >= scenario["negative_rate"]:
            return box, False
        x, y, w, h = box
        sides = int(rng.integers(1, 4))  # 1: width, 2: height, 3: both
        mirror = rng.random() < 0.5
        if sides & 1:
            x, w = (x + w, -w) if mirror else (x, -w)
        if sides & 2:
            y, h = (y + h, -h) if mirror else (y, -h)
        return [x, y, w, h], True

    for ann in split["annotations"]:
        ann["bbox"] = flatten(
            move(ann["bbox"], frames[ann["image_id"]], scenario["overhang_rate"], 0)
        )
        if ann["bbox"][2] * ann["bbox"][3] == 0:
            ann["area"] = 0.0
        ann["bbox"], negated = negate(ann["bbox"])
        if negated and rng.random() < 0.5:  # the area as w*h: negative for one side
            ann["area"] = ann["bbox"][2] * ann["bbox"][3]
    for det in detections:
        frame = frames.get(det["image_id"])
        det["bbox"] = flatten(
            move(det["bbox"], frame, scenario["overhang_rate"], scenario["outside_rate"])
        )
        det["bbox"], _ = negate(det["bbox"])
    for im in split["images"]:
        if rng.random() < scenario["sizeless_rate"]:
            del im["width"], im["height"]
    spoil_rate = scenario["non_finite_rate"]

    def spoil(values):
        """NaN, Infinity or -Infinity in place of some values: Python's json (which
        pycocotools reads with) writes and reads them as literals."""
        return [
            NON_FINITE[int(rng.integers(0, 3))] if rng.random() < spoil_rate else v for v in values
        ]

    if spoil_rate:
        for ann in split["annotations"]:
            ann["bbox"] = spoil(ann["bbox"])
            (ann["area"],) = spoil([ann["area"]])
        for det in detections:
            det["bbox"] = spoil(det["bbox"])
            (det["score"],) = spoil([det["score"]])
    big = scenario["big_ids"]  # beyond float64's exact integers, or signed 64 bits
    if big:  # (pycocotools keeps Python ints; the order of image ids decides ties)
        for im in split["images"]:
            im["id"] += big if im["id"] % 3 else -big
        for item in (*split["annotations"], *detections):
            item["image_id"] += big if (item["image_id"]) % 3 else -big
        for ann in split["annotations"]:
            ann["id"] += big
        shift_classes = rng.random() < 0.5
        if shift_classes:
            for item in (*split["categories"], *split["annotations"], *detections):
                key = "id" if "name" in item else "category_id"
                item[key] += big
        if 2**63 <= big < 2**64:
            # pycocotools' evaluate() runs np.unique on its id lists, which numpy makes
            # float64 when every id lies in [-2^63, 2^64) (ids lose their low bits and
            # images drop out, there and here: test_unique_lost_ids.py). One id past
            # 2^64 keeps them Python ints there, so most images are scored.
            split["images"].append({"id": 2**64 + 1000})
            if shift_classes:
                split["categories"].append({"id": 2**64 + 1000, "name": "anchor"})


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(scenario=scenarios)
def test_random_splits_match_pycocotools(tmp_path, scenario):
    """Randomised splits agree with pycocotools on all 12 numbers and per class."""
    rng = np.random.default_rng(scenario["seed"])
    width, height = (64, 48) if scenario["small_frame"] else (1280, 720)
    split = make_split(
        rng,
        n_images=scenario["n_images"],
        n_classes=scenario["n_classes"],
        boxes_per_image=scenario["boxes_per_image"],
        crowd_rate=scenario["crowd_rate"],
        width=width,
        height=height,
        area_noise=scenario["area_noise"],
        integer_coords=scenario["integer_coords"],
    )
    next_id = max(im["id"] for im in split["images"]) + 1
    for i in range(scenario["empty_images"]):  # neither boxes nor detections
        split["images"].append({"id": next_id + i, "width": width, "height": height})
    split["categories"].append({"id": 99, "name": "never_annotated"})
    detections = make_detections(
        rng,
        split,
        hit_rate=scenario["hit_rate"],
        jitter=scenario["jitter"],
        false_per_image=scenario["false_per_image"],
        duplicate_rate=scenario["duplicate_rate"],
        score_levels=scenario["score_levels"],
        extra_class_rate=scenario["extra_class_rate"],
    )
    if not detections:  # the reference cannot load an empty result list
        detections = [
            {
                "image_id": split["images"][0]["id"],
                "category_id": 1,
                "bbox": [1.0, 1.0, 5.0, 5.0],
                "score": 0.5,
            }
        ]
    roughen(rng, split, detections, scenario)
    _compare(tmp_path, split, detections)


def test_fixed_larger_split_matches_pycocotools_bit_for_bit(tmp_path):
    """A 300-image split with 80 classes: the 12 numbers are identical, not just close."""
    rng = np.random.default_rng(20261202)
    split = make_split(
        rng,
        n_images=300,
        n_classes=80,
        boxes_per_image=9,
        crowd_rate=0.02,
        width=1920,
        height=1080,
        area_noise=0.1,
    )
    detections = make_detections(
        rng, split, false_per_image=40, duplicate_rate=0.3, score_levels=200
    )
    ours, reference = _compare(tmp_path, split, detections)
    assert [as_reference(ours["summary"][k]) for k in COCO_SUMMARY_KEYS] == list(reference.stats)


def test_detection_across_the_frame_edge_scores_as_given(tmp_path):
    """The issue's example: detection [-20, 10, 40, 20] against ground truth
    [0, 10, 20, 20]. Kept as given, IoU = 400 / 800 = 0.5: a match at IoU 0.5 only, so
    AP50 = 1, AP75 = 0 and AP = 1/10 over the ten thresholds — pycocotools 2.0.11's
    numbers (checked by _compare). Clipping would make it [0, 10, 20, 20], IoU 1, AP 1."""
    split = _one_class_split([[0, 10, 20, 20]], width=100, height=100)
    detections = [{"image_id": 1, "category_id": 1, "bbox": [-20, 10, 40, 20], "score": 0.9}]
    ours, reference = _compare(tmp_path, split, detections)
    assert reference.stats[1] == pytest.approx(1.0) and reference.stats[2] == 0.0
    assert ours["summary"]["AP50"] == pytest.approx(1.0, abs=1e-12)
    assert ours["summary"]["AP75"] == 0.0
    assert ours["summary"]["AP"] == pytest.approx(0.1, abs=1e-12)
    assert ours["counts"]["boxes"]["predictions"]["out_of_frame"] == 1


def test_zero_area_and_wholly_outside_boxes_are_scored_like_pycocotools(tmp_path):
    """A zero-area ground truth counts as a positive that nothing can match (IoU 0 in
    pycocotools ``bbIou``); a zero-area detection and one wholly outside the image are
    false positives. Images without width/height are fine."""
    split = _one_class_split([[10, 10, 0, 30], [50, 50, 20, 20]])
    del split["images"][0]["width"], split["images"][0]["height"]
    split["annotations"][0]["area"] = 0.0
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": [10, 10, 0, 30], "score": 0.95},
        {"image_id": 1, "category_id": 1, "bbox": [500, 500, 20, 20], "score": 0.9},
        {"image_id": 1, "category_id": 1, "bbox": [50, 50, 20, 20], "score": 0.8},
    ]
    ours, _ = _compare(tmp_path, split, detections)
    assert ours["per_class"]["cyclist"]["tp"] == 1.0 and ours["per_class"]["cyclist"]["fp"] == 2.0


def test_negative_sizes_are_scored_like_pycocotools(tmp_path):
    """pycocotools 2.0.11 on boxes of negative size: ``bbIou`` gives them IoU 0 with
    everything; ``loadRes`` sets a detection's area to w*h, so one negative side puts
    it outside every size range (an unmatched detection there is ignored, not a false
    positive) while two negative sides give a positive area (a false positive); a
    ground truth's own ``area`` decides its bucket (negative: ignored everywhere)."""
    split = _one_class_split([[50, 50, 20, 20], [120, 10, -30, 40], [10, 150, 30, -20]])
    split["annotations"][1]["area"] = 1200.0  # a positive area, as a tool may state it
    split["annotations"][2]["area"] = -600.0  # the negative w*h
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": [70, 70, -20, -20], "score": 0.97},
        {"image_id": 1, "category_id": 1, "bbox": [120, 10, -30, 40], "score": 0.95},
        {"image_id": 1, "category_id": 1, "bbox": [50, 50, 20, 20], "score": 0.9},
    ]
    ours, reference = _compare(tmp_path, split, detections)
    row = ours["per_class"]["cyclist"]
    # 2 positives (the negative-area one is ignored); 1 TP, 1 FP (both sides negative),
    # the one-negative-side detection ignored.
    assert (row["tp"], row["fp"]) == (1.0, 1.0)
    assert ours["summary"]["AR100"] == pytest.approx(0.5) == reference.stats[8]
    assert ours["counts"]["boxes"]["truth"]["negative_size"] == 2
    assert ours["counts"]["boxes"]["predictions"]["negative_size"] == 2


def test_area_exactly_32_squared_is_both_small_and_medium(tmp_path):
    """Closed size intervals, as in pycocotools: area 1024 counts in small and medium."""
    split = {
        "images": [{"id": 1, "width": 100, "height": 100}],
        "annotations": [
            {
                "id": 1,
                "image_id": 1,
                "category_id": 1,
                "bbox": [10, 10, 32, 32],
                "area": 1024.0,
                "iscrowd": 0,
            }
        ],
        "categories": [{"id": 1, "name": "pedestrian"}],
    }
    detections = [{"image_id": 1, "category_id": 1, "bbox": [10, 10, 32, 32], "score": 0.9}]
    ours, _ = _compare(tmp_path, split, detections)
    assert ours["summary"]["AP_small"] == ours["summary"]["AP_medium"] > 0.99


def test_more_than_100_detections_keeps_the_top_100(tmp_path):
    """The reference keeps the 100 best per image and class; the 101st never counts."""
    split = {
        "images": [{"id": 1, "width": 1000, "height": 1000}],
        "annotations": [
            {
                "id": 1,
                "image_id": 1,
                "category_id": 1,
                "bbox": [500, 500, 50, 50],
                "area": 2500.0,
                "iscrowd": 0,
            }
        ],
        "categories": [{"id": 1, "name": "car"}],
    }
    false = [
        {"image_id": 1, "category_id": 1, "bbox": [i * 4.0, 0, 3, 3], "score": 0.9}
        for i in range(100)
    ]
    hit = [{"image_id": 1, "category_id": 1, "bbox": [500, 500, 50, 50], "score": 0.1}]
    ours, _ = _compare(tmp_path, split, false + hit)
    assert ours["summary"]["AR100"] == 0.0
    assert ours["counts"]["scored_predictions"] == 100


def _one_class_split(boxes, width=200, height=200):
    return {
        "images": [{"id": 1, "width": width, "height": height}],
        "annotations": [
            {
                "id": i + 1,
                "image_id": 1,
                "category_id": 1,
                "bbox": list(b),
                "area": float(b[2] * b[3]),
                "iscrowd": 0,
            }
            for i, b in enumerate(boxes)
        ],
        "categories": [{"id": 1, "name": "cyclist"}],
    }


def test_iou_exactly_at_the_threshold_matches(tmp_path):
    """IoU == t is a match (the reference skips only IoU < t): 0.5 and 0.75 exactly."""
    split = _one_class_split([[0, 0, 100, 100], [100, 100, 100, 100]])
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": [0, 0, 100, 50], "score": 0.9},  # IoU 0.5
        {"image_id": 1, "category_id": 1, "bbox": [100, 100, 100, 75], "score": 0.8},  # 0.75
    ]
    ours, _ = _compare(tmp_path, split, detections)
    row = ours["per_class"]["cyclist"]
    assert row["AP50"] > 0.99 and row["tp"] == 2.0
    # At IoU 0.75 only the second box matches, after one FP: precision 1/2 for the 51
    # recall points 0, 0.01, ..., 0.5, zero above (hand-worked).
    assert row["AP75"] == pytest.approx(0.5 * 51 / 101, abs=1e-12)


def test_equal_iou_goes_to_the_later_box(tmp_path):
    """On equal IoU the later ground truth in file order wins (pycocotools' `<` test),
    which here leaves the earlier box free for the next detection: both are TPs."""
    split = _one_class_split([[0, 0, 10, 10], [5, 0, 10, 10]])
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": [2.5, 0, 10, 10], "score": 0.9},  # 0.6 / 0.6
        {"image_id": 1, "category_id": 1, "bbox": [0, 0, 10, 10], "score": 0.8},
    ]
    ours, _ = _compare(tmp_path, split, detections)
    assert ours["per_class"]["cyclist"]["tp"] == 2.0


NAN, INF = float("nan"), float("inf")


def test_nan_and_infinite_values_are_scored_like_pycocotools(tmp_path):
    """pycocotools 2.0.11 reads NaN/Infinity literals (Python's json) and scores them
    with IEEE arithmetic: a NaN score ranks last (numpy's mergesort argsort of
    -score); ``bbIou``'s fmin/fmax ignore a NaN operand, so a detection of NaN width
    still overlaps [10, 10, 20, 20] by 20 x 20, its area NaN makes the IoU NaN, and
    ``evaluateImg``'s ``ious[d, g] < iou`` is false for NaN, so it matches (a TP);
    a NaN ``area`` lies in every size range, an infinite one in none."""
    split = {
        "images": [{"id": 1, "width": 100, "height": 100}, {"id": 2}],
        "annotations": [
            {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 20, 20], "area": NAN},
            {"id": 2, "image_id": 2, "category_id": 1, "bbox": [NAN, 10, 20, 20], "area": 400},
            {"id": 3, "image_id": 2, "category_id": 1, "bbox": [50, 50, INF, 20], "area": INF},
            {"id": 4, "image_id": 2, "category_id": 1, "bbox": [10, 60, 20, 20], "area": 400},
        ],
        "categories": [{"id": 1, "name": "car"}],
    }
    for ann in split["annotations"]:
        ann["iscrowd"] = 0
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": [10, 10, 20, 20], "score": NAN},
        {"image_id": 1, "category_id": 1, "bbox": [12, 10, 20, 20], "score": -INF},
        {"image_id": 2, "category_id": 1, "bbox": [10, 60, NAN, 20], "score": INF},
        {"image_id": 2, "category_id": 1, "bbox": [50, 50, 30, 20], "score": 0.7},
        {"image_id": 2, "category_id": 1, "bbox": [5, 10, 20, 20], "score": 0.5},
    ]
    ours, reference = _compare(tmp_path, split, detections)
    assert [as_reference(ours["summary"][k]) for k in COCO_SUMMARY_KEYS] == list(reference.stats)
    assert ours["per_class"]["car"]["tp"] >= 1.0  # the NaN-IoU match
    boxes = ours["counts"]["boxes"]
    assert boxes["truth"]["non_finite"] == 2 and boxes["truth"]["non_finite_area_from_file"] == 2
    assert boxes["predictions"]["non_finite"] == 1
    assert boxes["predictions"]["non_finite_score"] == 3


def test_ids_that_pycocotools_rounds_to_floats(tmp_path):
    """pycocotools 2.0.11 ``COCOeval.evaluate`` sets ``p.imgIds = list(np.unique(p.imgIds))``;
    numpy turns Python ints all within [-2^63, 2^64), one of them >= 2^63 and one below,
    into float64, so an id such as 2^63 + 1 becomes 2^63 and no longer finds its boxes:
    the reference scores nothing (-1 everywhere). So does the engine, and it counts the
    image left out (``counts.images_left_out``; ``test_unique_lost_ids.py``)."""
    big = 2**63 + 1
    split = _one_class_split([[10, 10, 20, 20]])
    split["images"][0]["id"] = split["annotations"][0]["image_id"] = big
    split["images"].append({"id": 5})  # an image without boxes: [big, 5] → float64
    path = tmp_path / "truth.json"
    detections = [{"image_id": big, "category_id": 1, "bbox": [10, 10, 20, 20], "score": 0.9}]
    import json

    path.write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    assert np.unique([big, 5]).dtype == np.float64  # the conversion itself
    reference = pycocotools_eval(path, tmp_path / "dt.json")
    assert list(reference.stats) == [-1.0] * 12
    truth = load_truth(path)
    ours = evaluate(truth, load_predictions(tmp_path / "dt.json", truth), "coco")
    assert [as_reference(ours["summary"][k]) for k in COCO_SUMMARY_KEYS] == [-1.0] * 12
    assert ours["counts"]["images_left_out"]["ids"] == [str(big)]
    assert truth.image_ids.tolist() == ["5", str(big)]


def test_an_empty_results_list_scores_as_a_detector_that_found_nothing(tmp_path):
    """``[]``: pycocotools 2.0.11's ``loadRes`` raises on ``anns[0]``; we score it (a
    deliberate deviation). The numbers are pycocotools' on the nearest file it accepts:
    one detection of a category the split does not list, which it never scores."""
    split = make_split(np.random.default_rng(5), n_images=4)
    unlisted = max(c["id"] for c in split["categories"]) + 1
    lone = [{"image_id": split["images"][0]["id"], "category_id": unlisted}]
    lone[0] |= {"bbox": [1, 1, 5, 5], "score": 0.5}
    reference = _compare(tmp_path, split, lone)
    (tmp_path / "empty.json").write_text("[]")
    truth = load_truth(tmp_path / "truth.json")
    empty = evaluate(truth, load_predictions(tmp_path / "empty.json", truth), "coco")
    assert empty["summary"] == reference[0]["summary"]
    assert empty["per_class"] == reference[0]["per_class"]
