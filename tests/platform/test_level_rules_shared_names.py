"""A level rule on a split whose COCO-style ground truth has two categories named
``Car`` (ids 1 and 2), shown as ``Car (id 1)``, ``Car (id 2)``
(``loaders.annotation_index.rename_shared_names``).

The KITTI object devkit knows a class only by the type string of a label line
(``cleanData`` compares it with ``strcasecmp``; ``evaluate_object.cpp``), so both
categories written as label lines are ``Car``: one class, which the stored ``kitti2d``
result keys by the first category's shown name (``Car (id 1)``; DEVELOPERS.md, "Class
names in rules are the categories' own names"). A ``*`` level rule must measure that
merged class, whether the detector lists the class as ``Car`` or by the shown names,
on the stored result, on the stored samples (a tag rule) and in a significance rule.
Every value is checked against ``oracle.kitti_eval_class`` / ``oracle.kitti_ap``, the
transliteration of the devkit's ``eval_class`` (tests/engine/oracle.py), run on the
split and detections written as KITTI label lines (each line's type is its category's
own name).
"""

import numpy as np
import pytest

from evaluation import services as evaluation_services
from releases import criteria, services, verdicts
from releases.models import Outcome

from ..engine import oracle
from ..engine.test_shared_names import _as_label_lines
from .conftest import upload

pytestmark = pytest.mark.django_db
N_IMAGES = 16
LEVELS = ("easy", "moderate", "hard")


def _dusk(image):
    return image % 2 == 0


def _split_and_detections(seed=11):
    """Images of 400x200 with 2-4 fully visible boxes of categories 1 and 2 (both named
    ``Car``) and 3 (``Pedestrian``), 30-120 px tall; per box a detection of either car
    category on it (so one category's detection often lies on the other's box) or
    shifted, plus false positives; scores drawn at random."""
    rng = np.random.default_rng(seed)
    images, annotations, dets = [], [], []
    for image in range(N_IMAGES):
        images.append(
            {"id": image + 1, "width": 400, "height": 200, "tags": ["dusk"] if _dusk(image) else []}
        )
        for k in range(int(rng.integers(2, 5))):
            category = int(rng.choice([1, 2, 3]))
            x, y = 90.0 * k + float(rng.integers(0, 20)), float(rng.integers(0, 60))
            w, h = float(rng.integers(20, 60)), float(rng.integers(30, 121))
            annotations.append(
                {
                    "id": len(annotations) + 1,
                    "image_id": image + 1,
                    "category_id": category,
                    "bbox": [x, y, w, h],
                    "area": w * h,
                    "iscrowd": 0,
                    "truncation": 0.0,
                    "occlusion": 0,
                }
            )
            if rng.random() < 0.85:
                shift = float(rng.choice([0.0, 0.0, 4.0, 12.0]))
                shown = category if category == 3 else int(rng.choice([1, 2]))
                dets.append(
                    {
                        "image_id": image + 1,
                        "category_id": shown,
                        "bbox": [x + shift, y, w, h],
                        "score": round(float(rng.random()), 3),
                    }
                )
        if rng.random() < 0.5:
            dets.append(
                {
                    "image_id": image + 1,
                    "category_id": int(rng.choice([1, 2, 3])),
                    "bbox": [360.0, 120.0, 30.0, 60.0],
                    "score": round(float(rng.random()), 3),
                }
            )
    categories = [
        {"id": 1, "name": "Car"},
        {"id": 2, "name": "Car"},
        {"id": 3, "name": "Pedestrian"},
    ]
    return {"images": images, "annotations": annotations, "categories": categories}, dets


def _devkit(truth, dets, cls, level, images=None):
    """AP over 40 recall positions of ``cls`` at ``level`` from the devkit's
    transliteration on the label lines (only ``images``, when given)."""
    gt, det = _as_label_lines(truth, dets)
    per_image_gt = [[] for _ in truth["images"]]
    per_image_det = [[] for _ in truth["images"]]
    for a, line in zip(truth["annotations"], gt[0]):
        per_image_gt[a["image_id"] - 1].append(line)
    for d, line in zip(dets, det[0]):
        per_image_det[d["image_id"] - 1].append(line)
    keep = range(len(truth["images"])) if images is None else images
    precision, n_gt = oracle.kitti_eval_class(
        cls, [per_image_gt[i] for i in keep], [per_image_det[i] for i in keep], LEVELS.index(level)
    )
    assert n_gt > 0
    return oracle.kitti_ap(precision)[0]


@pytest.fixture
def shared(team, users, run_tasks, django_capture_on_commit_callbacks):
    truth, dets = _split_and_detections()
    split = evaluation_services.load_split(
        name="two-car-ids", revision=1, truth=upload("two-car-ids.json", truth)
    )
    assert split.classes == ["Car (id 1)", "Car (id 2)", "Pedestrian"]
    return {"truth": truth, "dets": dets, "split": split}


def _scored(shared, team, users, run_tasks, classes, django_capture_on_commit_callbacks):
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(
            team, "Two car ids", classes, protocols=("coco", "kitti2d"), splits=["two-car-ids"]
        )
    version = services.create_version(detector, "1.0", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        shared["split"],
        upload("dets.json", shared["dets"]),
        users["engineer"],
    )
    return detector, version


def _judged(detector, version, users, run_tasks, rules):
    run_tasks(criteria.set_criteria, detector, users["lead"], rules)
    latest = detector.criteria.order_by("-number").first()
    return verdicts.verdict_of(version), list(
        Outcome.objects.filter(version=version, criteria=latest).order_by("id")
    )


@pytest.mark.parametrize(
    "classes, cars",
    [
        (["Car", "Pedestrian"], ["Car"]),  # the class by its own name
        (["Car (id 1)", "Car (id 2)", "Pedestrian"], ["Car (id 1)", "Car (id 2)"]),  # as shown
    ],
)
def test_a_star_level_rule_measures_the_merged_car_class(
    shared, team, users, run_tasks, classes, cars, django_capture_on_commit_callbacks
):
    """Each detector class naming a ``Car`` category is measured as the devkit's one
    ``Car`` class (before: "not measured", or left out of ``*``); Pedestrian as usual."""
    detector, version = _scored(
        shared, team, users, run_tasks, classes, django_capture_on_commit_callbacks
    )
    truth, dets = shared["truth"], shared["dets"]
    dusk = [i for i in range(N_IMAGES) if _dusk(i)]
    rules = [
        {"kind": "min_value", "level": level, "class": "*", "split": "*", "threshold": 0.0}
        for level in LEVELS
    ] + [
        {"kind": "min_value", "level": "moderate", "class": "*", "split": "*", "threshold": 0.0,
         "tag": "dusk"},
    ]  # fmt: skip
    verdict, outcomes = _judged(detector, version, users, run_tasks, rules)
    assert verdict.state == "pass", verdict.reasons
    expected = {}
    for index, level in enumerate(LEVELS):
        for name in [*cars, "Pedestrian"]:
            cls = "pedestrian" if name == "Pedestrian" else "car"
            expected[(index, name)] = _devkit(truth, dets, cls, level)
    for name in [*cars, "Pedestrian"]:
        cls = "pedestrian" if name == "Pedestrian" else "car"
        expected[(3, name)] = _devkit(truth, dets, cls, "moderate", dusk)
    got = {(o.rule_index, o.class_name): o for o in outcomes}
    assert set(got) == set(expected)
    for key, value in expected.items():
        outcome = got[key]
        assert outcome.status == "pass", outcome.detail
        assert outcome.value == pytest.approx(value, abs=1e-12), (key, outcome.detail)
    # the tag restricts the images: not the whole split's number
    assert expected[(3, cars[0])] != expected[(1, cars[0])]
    shown = [o.detail for (i, name), o in got.items() if name in cars and name != "Car (id 1)"]
    assert all("'Car (id 1)'" in detail for detail in shown), shown


def test_a_significance_rule_on_the_merged_car_class(
    shared, team, users, run_tasks, django_capture_on_commit_callbacks
):
    """The baseline's own predictions again: Car measured on the samples, Δ 0, a pass."""
    detector, base = _scored(
        shared, team, users, run_tasks, ["Car", "Pedestrian"], django_capture_on_commit_callbacks
    )
    run_tasks(services.sign_off, base, users["lead"], "approved", "baseline")
    candidate = services.create_version(detector, "1.1", users["engineer"])
    run_tasks(
        services.submit_predictions,
        candidate,
        shared["split"],
        upload("dets.json", shared["dets"]),
        users["engineer"],
    )
    rule = {"kind": "no_significant_drop", "level": "moderate", "class": "Car", "split": "*"}
    verdict, (outcome,) = _judged(detector, candidate, users, run_tasks, [rule])
    assert verdict.state == "pass", verdict.reasons
    car = _devkit(shared["truth"], shared["dets"], "car", "moderate")
    assert outcome.value == pytest.approx(car, abs=1e-12)
    assert outcome.baseline_value == pytest.approx(car, abs=1e-12)
    assert outcome.low == pytest.approx(0.0, abs=1e-12) and outcome.high == pytest.approx(
        0.0, abs=1e-12
    )
