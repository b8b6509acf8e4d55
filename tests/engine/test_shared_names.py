"""Rules that name classes read a category's own name, not its shown name.

Two COCO categories may share a name (pycocotools never reads names); the loader shows
them as ``car (id 1)``, ``car (id 2)`` so per-class numbers stay apart
(``loaders.annotation_index.rename_shared_names``). The rules that name classes are
rules about names, so they apply to both:

* ``recall40``: "IoU 0.7 for car/van/bus/truck (class names match in any case)" (the
  README's ``recall40`` row; vehicles at 0.7 is common practice, the KITTI devkit's
  class threshold "Car 0.7", from memory). Checked against ``oracle.greedy_ap`` (the
  pycocotools ``evaluateImg``/``accumulate`` transliteration the recall40 tests use)
  with thresholds taken from the rule and the file's own category names.
* ``kitti2d``: the devkit knows a class only by the type string of a label line
  (``cleanData`` compares it with ``strcasecmp``), so two categories named ``Car``
  written as KITTI labels are all ``Car`` lines: one class. Checked against
  ``oracle.kitti_eval_class`` on those label lines.
* ``miss-rate``: the pedestrian toolbox reads a label per box; ``people`` is an ignore
  label for ``person`` (the engine's neighbouring labels ``person?``, ``people``,
  ``ignore``, as ``pedestrian`` documents them), so every category named ``people``
  is. Checked against ``pedestrian_oracle.toolbox`` with those boxes as ignore rows.

The cases are the red team's (audit 6, F1 and F1c) with the arithmetic.
"""

import json

import numpy as np
import pytest

from evaluation.engine import (
    PRESETS,
    InputError,
    evaluate,
    load_predictions,
    load_truth,
    protocol_from_dict,
)
from evaluation.engine.difficulty import evaluate_levels
from evaluation.engine.level_provenance import annotate_levels
from evaluation.engine.pedestrian import evaluate_setups
from evaluation.engine.provenance import annotate

from . import oracle, pedestrian_oracle

#: README ``recall40`` row: IoU 0.7 for these, 0.5 for other classes.
RECALL40_VEHICLES = {"car", "van", "bus", "truck"}


def _write(tmp_path, truth, detections):
    (tmp_path / "gt.json").write_text(json.dumps(truth))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    loaded = load_truth(tmp_path / "gt.json")
    return loaded, load_predictions(tmp_path / "dt.json", loaded)


def _cars(names=("car", "car")):
    """Two 10x10 boxes, one per category; one detection each, shifted 2.5 px:
    IoU = (7.5 * 10) / (100 + 100 - 75) = 0.6 (the red team's F1 case)."""
    truth = {
        "images": [{"id": 1, "width": 100, "height": 100}],
        "annotations": [
            {"id": 1, "image_id": 1, "category_id": 1, "bbox": [0, 0, 10, 10], "area": 100},
            {"id": 2, "image_id": 1, "category_id": 2, "bbox": [50, 50, 10, 10], "area": 100},
        ],
        "categories": [{"id": 1, "name": names[0]}, {"id": 2, "name": names[1]}],
    }
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": [2.5, 0, 10, 10], "score": 0.9},
        {"image_id": 1, "category_id": 2, "bbox": [52.5, 50, 10, 10], "score": 0.9},
    ]
    return truth, detections


def _rule_thresholds(truth_json, truth):
    """The README rule on the file's own names, in the loaded class order."""
    own = {c["id"]: c["name"] for c in truth_json["categories"]}
    return [[0.7 if own[int(i)].casefold() in RECALL40_VEHICLES else 0.5 for i in truth.class_ids]]


def _recall40_oracle(truth_json, truth, predictions):
    p = PRESETS["recall40"]
    return oracle.greedy_ap(
        truth,
        predictions,
        thresholds=_rule_thresholds(truth_json, truth),
        recall_points=p.recall_points,
        max_detections=p.max_detections_limit,
        epsilon=p.precision_epsilon,
        difficult=p.difficult_ignored,
    )[0]


@pytest.mark.parametrize("names", [("car", "car"), ("car", "truck"), ("Car", "CAR")])
def test_recall40_vehicle_iou_applies_to_categories_sharing_a_name(tmp_path, names):
    """IoU 0.6 < 0.7: no true positive, AP 0 for both classes, whether the two
    categories share the name ``car`` (shown ``car (id 1)``, ``car (id 2)``) or not
    (the red team's control names the second ``truck``). Before: 0.5 and AP 1."""
    truth_json, dets = _cars(names)
    truth, predictions = _write(tmp_path, truth_json, dets)
    result, records = evaluate(truth, predictions, "recall40", return_records=True)
    result = annotate(result, truth, predictions, records, "recall40")
    expected = _recall40_oracle(truth_json, truth, predictions)
    assert expected.tolist() == [0.0, 0.0]
    assert [result["per_class"][c]["AP"] for c in truth.classes] == expected.tolist()
    record = result["protocol_record"]["class_iou_thresholds"]
    assert record == dict.fromkeys(truth.classes, 0.7)  # keyed apart by the shown name
    if names == ("car", "car"):
        assert truth.classes == ("car (id 1)", "car (id 2)")


def test_recall40_on_random_splits_with_shared_names_follows_the_rule(tmp_path):
    """Categories car, car, Van, person, person (ids 1-5) on random boxes and
    detections: per-class AP equals the transliteration's at the rule's thresholds."""
    rng = np.random.default_rng(5)
    names = ["car", "car", "Van", "person", "person"]
    for seed in range(4):
        anns, dets = [], []
        for image in range(1, 5):
            for _ in range(rng.integers(1, 7)):
                cat = int(rng.integers(1, 6))
                x, y = rng.uniform(0, 80, 2)
                box = [float(x), float(y), float(rng.uniform(8, 20)), float(rng.uniform(8, 20))]
                anns.append(
                    {"id": len(anns) + 1, "image_id": image, "category_id": cat, "bbox": box}
                )
                for _ in range(rng.integers(0, 3)):
                    jitter = (rng.uniform(-3, 3, 4) * [1, 1, 0.3, 0.3]).tolist()
                    cat_d = cat if rng.uniform() < 0.8 else int(rng.integers(1, 6))
                    dets.append(
                        {
                            "image_id": image,
                            "category_id": cat_d,
                            "bbox": [b + j for b, j in zip(box, jitter)],
                            "score": float(rng.uniform()),
                        }
                    )
        for a in anns:
            a["area"] = a["bbox"][2] * a["bbox"][3]
        truth_json = {
            "images": [{"id": i, "width": 100, "height": 100} for i in range(1, 5)],
            "annotations": anns,
            "categories": [{"id": i + 1, "name": n} for i, n in enumerate(names)],
        }
        folder = tmp_path / str(seed)
        folder.mkdir()
        truth, predictions = _write(folder, truth_json, dets)
        result = evaluate(truth, predictions, "recall40")
        expected = _recall40_oracle(truth_json, truth, predictions)
        ours = [
            np.nan
            if result["per_class"].get(c, {}).get("AP") is None
            else result["per_class"][c]["AP"]
            for c in truth.classes
        ]
        np.testing.assert_allclose(ours, expected, rtol=0, atol=1e-12)


def test_custom_threshold_naming_a_shared_name_applies_to_every_such_category(tmp_path):
    """``{"car": 0.7}`` is accepted on the split of two ``car`` categories (before:
    "'car' is not a class of the split") and applies to both; a shown name picks one
    category and wins for it; a name matching neither is refused, listing the classes."""
    truth_json, dets = _cars()
    truth, predictions = _write(tmp_path, truth_json, dets)
    both = protocol_from_dict(
        {"name": "carx", "iou_thresholds": [0.5], "class_iou_thresholds": {"car": 0.7}}
    )
    assert both.threshold_table(truth.classes, truth.category_names).tolist() == [[0.7, 0.7]]
    result = evaluate(truth, predictions, both)
    assert [result["per_class"][c]["AP"] for c in truth.classes] == [0.0, 0.0]
    one = protocol_from_dict(
        {
            "name": "carx2",
            "iou_thresholds": [0.5],
            "class_iou_thresholds": {"CAR": 0.7, "car (id 2)": 0.55},
        }
    )
    assert one.threshold_table(truth.classes, truth.category_names).tolist() == [[0.7, 0.55]]
    result = evaluate(truth, predictions, one)  # IoU 0.6 passes 0.55 only
    expected = oracle.greedy_ap(  # the pycocotools transliteration at 0.7 and 0.55
        truth,
        predictions,
        thresholds=[[0.7, 0.55]],
        recall_points=one.recall_points,
        max_detections=one.max_detections_limit,
        epsilon=one.precision_epsilon,
        difficult=one.difficult_ignored,
    )[0]
    assert expected[0] == 0.0 and expected[1] == pytest.approx(1.0, abs=1e-15)
    assert [result["per_class"][c]["AP"] for c in truth.classes] == expected.tolist()
    wrong = protocol_from_dict({"name": "t", "class_iou_thresholds": {"tram": 0.6}})
    with pytest.raises(
        InputError,
        match=r"'tram' is not a class of the split \(classes: car \(id 1\), car \(id 2\)\)",
    ):
        wrong.threshold_table(truth.classes, truth.category_names)


def _kitti_split(names):
    """Two 50 px tall cars, one per category, fully visible; each category's
    detection lies exactly on the *other* category's box."""
    truth = {
        "images": [{"id": 1, "width": 200, "height": 200}],
        "annotations": [
            {"id": 1, "image_id": 1, "category_id": 1, "bbox": [0, 0, 50, 50]},
            {"id": 2, "image_id": 1, "category_id": 2, "bbox": [100, 100, 50, 50]},
        ],
        "categories": [{"id": 1, "name": names[0]}, {"id": 2, "name": names[1]}],
    }
    for a in truth["annotations"]:
        a.update(area=2500, truncation=0.0, occlusion=0)
    dets = [
        {"image_id": 1, "category_id": 2, "bbox": [0, 0, 50, 50], "score": 0.9},
        {"image_id": 1, "category_id": 1, "bbox": [100, 100, 50, 50], "score": 0.8},
    ]
    return truth, dets


def _as_label_lines(truth_json, dets):
    """The split and detections as the devkit would read them from KITTI label files:
    each line's type is its category's name (the oracle's tuples)."""
    name = {c["id"]: c["name"] for c in truth_json["categories"]}
    corners = lambda b: (b[0], b[1], b[0] + b[2], b[1] + b[3])  # noqa: E731
    gt = [
        (name[a["category_id"]], *corners(a["bbox"]), a["truncation"], a["occlusion"])
        for a in truth_json["annotations"]
    ]
    det = [(name[d["category_id"]], *corners(d["bbox"]), d["score"]) for d in dets]
    return [gt], [det]


def test_kitti2d_categories_sharing_the_name_car_are_one_class(tmp_path):
    """Written as label lines both categories are ``Car``: one class of 2 boxes, and
    each detection matches the other category's box (2 TP). Before: no class at all.
    Keyed by the first category's shown name; the second is named as evaluated with it."""
    truth_json, dets = _kitti_split(("Car", "Car"))
    truth, predictions = _write(tmp_path, truth_json, dets)
    result = annotate_levels(evaluate_levels(truth, predictions), "kitti2d", truth, predictions)
    gt, det = _as_label_lines(truth_json, dets)
    for level in ("easy", "moderate", "hard"):
        precision, n_gt = oracle.kitti_eval_class(
            "car", gt, det, ("easy", "moderate", "hard").index(level)
        )
        ours = result["levels"][level]["classes"]
        assert list(ours) == ["Car (id 1)"]
        assert ours["Car (id 1)"]["n_gt"] == n_gt == 2
        assert ours["Car (id 1)"]["precision"] == precision
        assert ours["Car (id 1)"]["AP_R40"] == oracle.kitti_ap(precision)[0]
    assert precision[:3] == [1.0, 1.0, 0.0]  # both found: two slots of 1 (n_gt = 2)
    record = result["protocol_record"]
    assert record["class_iou_thresholds"] == {"Car (id 1)": 0.7, "Car (id 2)": 0.7}
    assert record["absent_classes"]["Car (id 2)"].startswith("evaluated with 'Car (id 1)'")
    assert result["counts"]["scored_predictions"] == 2


def test_kitti2d_control_car_and_van():
    """Control (the red team's): ``Car`` and ``Van`` stay apart (Van a neighbour)."""
    truth_json, dets = _kitti_split(("Car", "Van"))
    gt, det = _as_label_lines(truth_json, dets)
    precision, n_gt = oracle.kitti_eval_class("car", gt, det, 1)
    assert n_gt == 1 and precision[0] == 0.0  # the Car detection sits on the Van box


def _people_case(names):
    """The red team's F1c: a person box and two neighbour boxes, all 100 px tall;
    three person detections, one on each box."""
    boxes = [[10, 10, 40, 100], [200, 10, 80, 100], [400, 10, 80, 100]]
    truth = {
        "images": [{"id": 1, "width": 640, "height": 480}],
        "annotations": [
            {"id": i + 1, "image_id": 1, "category_id": i + 1, "bbox": b, "area": b[2] * b[3]}
            for i, b in enumerate(boxes)
        ],
        "categories": [{"id": i + 1, "name": n} for i, n in enumerate(names)],
    }
    dets = [
        {"image_id": 1, "category_id": 1, "bbox": [10, 10, 40, 100], "score": 0.9},
        {"image_id": 1, "category_id": 1, "bbox": [210, 10, 40, 100], "score": 0.95},
        {"image_id": 1, "category_id": 1, "bbox": [410, 10, 40, 100], "score": 0.97},
    ]
    return truth, dets, boxes


@pytest.mark.parametrize("names", [("person", "people", "people"), ("person", "people", "person?")])
def test_miss_rate_every_category_named_people_is_an_ignore_label(tmp_path, names):
    """The detections on the two neighbour boxes lie inside them (intersection over the
    detection's area 1 >= 0.5): ignored, not false positives. The person box is found:
    miss rate 0 at every reference, clamped to 1e-10 (toolbox ``dbEval``). Before, with
    two ``people`` categories: 2 FP, headline 1.0, each ``people`` evaluated as a class."""
    truth_json, dets, boxes = _people_case(names)
    truth, predictions = _write(tmp_path, truth_json, dets)
    result = annotate_levels(evaluate_setups(truth, predictions), "miss-rate", truth, predictions)
    scene = [
        (
            [(*b, None, int(i > 0)) for i, b in enumerate(boxes)],  # neighbours: ignore rows
            [(*d["bbox"], d["score"]) for d in dets],
        )
    ]
    lamr, _ = pedestrian_oracle.toolbox(scene, "reasonable")
    person = result["levels"]["reasonable"]["classes"]
    assert list(person) == ["person"]
    assert person["person"]["miss_rate"] == pytest.approx(lamr, rel=1e-12) == pytest.approx(1e-10)
    assert person["person"]["detections"]["false_positive"] == 0
    assert person["person"]["detections"]["ignored"] == 2
    assert result["headline"] == person["person"]["miss_rate"]
    absent = result["protocol_record"]["absent_classes"]
    assert set(absent) == set(truth.classes[1:])
    assert all(v.startswith("a neighbouring class") for v in absent.values())


def test_own_names_survive_the_cache(tmp_path):
    """A cached split keeps each category's own name (``CACHE_SCHEMA`` 18): scored from
    the cache, recall40 still takes 0.7 for both ``car`` categories."""
    truth_json, _ = _cars()
    (tmp_path / "gt.json").write_text(json.dumps(truth_json))
    first = load_truth(tmp_path / "gt.json", cache_dir=tmp_path / "cache")
    again = load_truth(tmp_path / "gt.json", cache_dir=tmp_path / "cache")
    assert any((tmp_path / "cache").iterdir())
    assert again.classes == first.classes == ("car (id 1)", "car (id 2)")
    assert again.category_names == first.category_names == ("car", "car")
    table = PRESETS["recall40"].threshold_table(again.classes, again.category_names)
    assert table.tolist() == [[0.7, 0.7]]
