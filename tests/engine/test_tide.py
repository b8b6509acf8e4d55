"""The TIDE error breakdown: ΔAP per error type (Bolya et al., ECCV 2020).

Checked against the published implementation, ``tidecv`` 1.0.1 from PyPI, on random
files where its conventions and ours coincide, and on a case worked by hand.
"""

import dataclasses
import json

import numpy as np
import pytest

from evaluation.engine import PRESETS, load_predictions, load_truth, match, score_records
from evaluation.engine.tide import ERROR_TYPES, error_breakdown

from .synthetic import make_detections, make_split

#: tidecv's conventions as a protocol: greedy matching at IoU 0.5, 101 recall points
#: computed as k / 100 (tidecv ``APDataObject.get_ap``), precision without epsilon.
TIDE_LIKE = dataclasses.replace(
    PRESETS["coco"],
    name="tide-like",
    iou_thresholds=(0.5,),
    recall_points=tuple(k / 100 for k in range(101)),
    precision_epsilon=0.0,
    max_detections=(100,),
    coco_summary=False,
)
ALL_POINT = dataclasses.replace(TIDE_LIKE, name="all-point", recall_points=None)


def _load(tmp_path, split, detections):
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = load_truth(tmp_path / "gt.json")
    return truth, load_predictions(tmp_path / "dt.json", truth)


# A worked case. Person boxes A [0,0,10,10], B [20,0,10,10], C [40,0,10,10],
# D [60,0,10,10]; a car box E [0,30,10,10]. Person detections, by score:
#   d1 0.9 on A exactly                      -> tp
#   d2 0.8 [25,0,10,10]: 50 / 150 = 1/3 on B -> fp_localisation (B untaken: fixable)
#   d3 0.7 [0,0,10,8]:   80 / 100 = 0.8 on A -> fp_duplicate (A taken by d1)
#   d4 0.6 [0,30,10,9]:  90 / 100 = 0.9 on E -> fp_class (E untaken: fixable, as a car)
#   d5 0.5 [80,80,5,5]   touches nothing     -> fp_background
#   d6 0.4 on C exactly                      -> tp
# D: missed, no error points at it (TIDE's missed ground truth).
WORKED_SPLIT = {
    "images": [{"id": 1, "width": 100, "height": 100}],
    "categories": [{"id": 1, "name": "person"}, {"id": 2, "name": "car"}],
    "annotations": [
        {"id": i + 1, "image_id": 1, "category_id": c, "bbox": b, "area": 100.0}
        for i, (c, b) in enumerate(
            [
                (1, [0, 0, 10, 10]),
                (1, [20, 0, 10, 10]),
                (1, [40, 0, 10, 10]),
                (1, [60, 0, 10, 10]),
                (2, [0, 30, 10, 10]),
            ]
        )
    ],
}
WORKED_DETECTIONS = [
    {"image_id": 1, "category_id": 1, "bbox": b, "score": s}
    for b, s in [
        ([0, 0, 10, 10], 0.9),
        ([25, 0, 10, 10], 0.8),
        ([0, 0, 10, 8], 0.7),
        ([0, 30, 10, 9], 0.6),
        ([80, 80, 5, 5], 0.5),
        ([40, 0, 10, 10], 0.4),
    ]
]


def test_worked_case(tmp_path):
    """All-point AP (area under the precision envelope, VOC 2010+; Everingham et al.,
    IJCV 2010) before and after each fix, by hand."""
    truth, predictions = _load(tmp_path, WORKED_SPLIT, WORKED_DETECTIONS)
    result = error_breakdown(match(truth, predictions, ALL_POINT), ALL_POINT)
    person, car = result["per_class"]["person"], result["per_class"]["car"]
    # Person ranking: TP FP FP FP FP TP, 4 positives. TP points (tp, fp) = (1, 0) at
    # recall 1/4, precision 1; (2, 4) at recall 2/4, precision 2/6.
    # AP = 1/4 * 1 + 1/4 * 1/3 = 1/3. Car: 1 positive, no detection: AP 0.
    assert person["AP"] == pytest.approx(1 / 3)
    assert car["AP"] == 0.0
    assert result["mean"]["AP"] == pytest.approx(1 / 6)
    # Localisation: d2 becomes a TP: (1,0) (2,0) (3,3) -> 1/4 + 1/4 + 1/4 * 3/6 = 0.625.
    assert person["delta"]["localisation"] == pytest.approx(0.625 - 1 / 3)
    # Classification: d4 leaves person (TP FP FP FP TP: (1,0) (2,3) -> 1/4 + 1/4 * 2/5
    # = 0.35) and is a TP of car (AP 1).
    assert person["delta"]["classification"] == pytest.approx(0.35 - 1 / 3)
    assert car["delta"]["classification"] == pytest.approx(1.0)
    assert result["mean"]["delta"]["classification"] == pytest.approx((0.35 + 1) / 2 - 1 / 6)
    # Duplicate (d3) or background (d5) removed: one FP fewer before d6, AP 0.35.
    assert person["delta"]["duplicate"] == pytest.approx(0.35 - 1 / 3)
    assert person["delta"]["background"] == pytest.approx(0.35 - 1 / 3)
    assert result["mean"]["delta"]["background"] == pytest.approx((0.35 - 1 / 3) / 2)
    assert person["delta"]["both"] == 0.0
    # Missed: only D leaves the positives (B and E have errors pointing at them):
    # 3 positives, (1,0) at recall 1/3, (2,4) at 2/3 -> 1/3 + 1/3 * 1/3 = 4/9.
    assert person["delta"]["missed"] == pytest.approx(4 / 9 - 1 / 3)
    assert car["delta"]["missed"] == 0.0
    assert person["count"] == {
        "classification": 1,
        "localisation": 1,
        "both": 0,
        "duplicate": 1,
        "background": 1,
        "missed": 1,
    }
    assert car["count"]["missed"] == 0


def test_base_ap_is_the_scorecards(tmp_path):
    """Before any fix, the breakdown's AP is the scorecard's AP at the primary slot
    (AP50 of ``coco``) for every class and preset."""
    rng = np.random.default_rng(3)
    split = make_split(rng, n_images=30, n_classes=4)
    truth, predictions = _load(tmp_path, split, make_detections(rng, split))
    for name in ("coco", "voc07", "voc", "recall40"):
        protocol = PRESETS[name]
        records = match(truth, predictions, protocol)
        card = score_records(records, protocol)
        result = error_breakdown(records, protocol)
        for cls, row in result["per_class"].items():
            expected = card["per_class"][cls]["AP50" if name == "coco" else "AP"]
            assert row["AP"] == pytest.approx(expected, abs=1e-12), (name, cls)
            assert all(v >= -1e-12 for v in row["delta"].values() if v is not None)


def _tidecv(split, detections):
    """tidecv 1.0.1: a TIDE run at foreground 0.5, background 0.1, boxes."""
    from tidecv import TIDE, Data

    gt, preds = Data("gt"), Data("preds")
    for image in split["images"]:
        gt.add_image(image["id"], str(image["id"]))
    for a in split["annotations"]:
        gt.add_ground_truth(a["image_id"], a["category_id"], a["bbox"])
    for d in detections:
        preds.add_detection(d["image_id"], d["category_id"], d["score"], d["bbox"])
    return TIDE(pos_threshold=0.5, background_threshold=0.1).evaluate(gt, preds, mode=TIDE.BOX)


@pytest.mark.parametrize("seed", range(6))
def test_against_tidecv(tmp_path, seed):
    """ΔAP per error type, per class and mean, equal to tidecv 1.0.1's
    (``TIDERun.fix_errors`` / ``fix_main_errors``, ×100 there) where conventions
    coincide: no crowd regions, every class with ground truth, under 100 detections per
    image (its cap is per image, ours per image and class), continuous scores, its 101
    recall points k/100 and precision without epsilon."""
    tidecv = pytest.importorskip("tidecv")
    errors = tidecv.errors.main_errors
    by_type = {
        "classification": errors.ClassError,
        "localisation": errors.BoxError,
        "both": errors.OtherError,
        "duplicate": errors.DuplicateError,
        "background": errors.BackgroundError,
        "missed": errors.MissedError,
    }
    rng = np.random.default_rng(100 + seed)
    split = make_split(rng, n_images=25, n_classes=3, crowd_rate=0.0, boxes_per_image=6)
    present = {a["category_id"] for a in split["annotations"]}
    assert present == {1, 2, 3}
    detections = make_detections(rng, split, jitter=0.15, duplicate_rate=0.4)
    for d in detections:  # more confusions between classes
        if rng.random() < 0.15:
            d["category_id"] = d["category_id"] % 3 + 1
    truth, predictions = _load(tmp_path, split, detections)
    ours = error_breakdown(match(truth, predictions, TIDE_LIKE), TIDE_LIKE)
    assert all(ours["mean"]["count"][e] >= 3 for e in ERROR_TYPES), ours["mean"]["count"]
    run = _tidecv(split, detections)
    ids = {c["name"]: c["id"] for c in split["categories"]}

    assert ours["mean"]["AP"] * 100 == pytest.approx(run.ap, abs=1e-9)
    reference = {t.short_name: v for t, v in run.fix_main_errors().items()}
    for name, kind in by_type.items():
        assert ours["mean"]["delta"][name] * 100 == pytest.approx(
            reference[kind.short_name], abs=1e-9
        ), name
        fixed = run.fix_errors(lambda e, kind=kind: isinstance(e, kind))
        for cls, row in ours["per_class"].items():
            before = run.ap_data.objs[ids[cls]].get_ap()
            after = fixed.objs[ids[cls]].get_ap()
            assert row["delta"][name] * 100 == pytest.approx(after - before, abs=1e-9), (name, cls)
            assert row["count"][name] == sum(
                1
                for e in run.error_dict[kind]
                if (e.pred if hasattr(e, "pred") else e.gt)["class"] == ids[cls]
            ), (name, cls)
    special = {t.short_name: v for t, v in run.fix_special_errors().items()}
    assert ours["mean"]["delta"]["false_positives"] * 100 == pytest.approx(
        special["FalsePos"], abs=1e-9
    )
    assert ours["mean"]["delta"]["false_negatives"] * 100 == pytest.approx(
        special["FalseNeg"], abs=1e-9
    )
    assert set(ERROR_TYPES) == set(by_type)
