"""Release rules on slices: every rule metric (AP, AP50, AP75, recall) under an image tag
or a size bucket is judged on its own number — checked against the reference
implementation, pycocotools 2.0.11 (``COCOeval`` on the split cut to the tag; its own
``areaRng`` for small / medium / large) — never "no data" for want of a stored column.
Scorecards stored before these columns existed are completed from their match records,
or judged *missing* when those cannot be read. Every door that sets criteria or records
a decision (page, API, command) keeps the promise."""

import json
import re

import numpy as np
import pytest
from django.urls import reverse

from evaluation import scoring as evaluation_scoring
from evaluation import services as evaluation_services
from evaluation.models import SliceScore
from releases import criteria, services, verdicts
from releases.models import Outcome, ReleaseCriteria, SignOff

from ..engine.conftest import pycocotools_eval
from ..engine.synthetic import make_detections, make_split
from ..engine.test_slice_metrics import _reference
from .conftest import CLASSES, upload
from .test_gate_entry_points import _api, _command

pytestmark = pytest.mark.django_db
METRICS = ("AP", "AP50", "AP75", "recall")
SIZES = ("small", "medium", "large")


@pytest.fixture
def scene():
    rng = np.random.default_rng(41)
    truth = make_split(
        rng, n_images=40, n_classes=3, boxes_per_image=6, crowd_rate=0.0, tags=("night",)
    )
    for category, name in zip(truth["categories"], CLASSES):
        category["name"] = name
    detections = make_detections(rng, truth, hit_rate=0.85, false_per_image=1)
    split = evaluation_services.load_split(
        name="harbour-loop", revision=2, truth=upload("h.json", truth)
    )
    return split, truth, detections


def _score(detector, scene, users, run_tasks, label, detections=None):
    split, _, found = scene
    version = services.create_version(detector, label, users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload(f"{label}.json", found if detections is None else detections),
        users["engineer"],
    )
    return version


def _every_metric(**where):
    return [
        {"kind": "min_value", "metric": m, "class": c, "threshold": 0.0, **where}
        for m in METRICS
        for c in ("mean", "*")
    ]


def _outcomes(version):
    return {(o.rule["metric"], o.class_name): o for o in Outcome.objects.filter(version=version)}


def _check_against(outcomes, reference):
    names = {"mean": "mean", **{name: k for k, name in enumerate(CLASSES)}}
    for (metric, name), outcome in outcomes.items():
        expected = reference[names[name]][metric]
        assert outcome.status == "pass", outcome.detail
        assert outcome.value == pytest.approx(expected, abs=1e-12), (metric, name)


def _cut_reference(tmp_path, truth, detections, tag):
    keep = {im["id"] for im in truth["images"] if tag in im["tags"]}
    cut = {
        **truth,
        "images": [im for im in truth["images"] if im["id"] in keep],
        "annotations": [a for a in truth["annotations"] if a["image_id"] in keep],
    }
    gt, dt = tmp_path / "cut-gt.json", tmp_path / "cut-dt.json"
    gt.write_text(json.dumps(cut))
    dt.write_text(json.dumps([d for d in detections if d["image_id"] in keep]))
    return _reference(pycocotools_eval(gt, dt), area=0)


def test_every_metric_of_a_tag_rule_is_judged_on_the_tag(
    detector, scene, users, run_tasks, tmp_path
):
    criteria.set_criteria(detector, users["lead"], _every_metric(tag="night"))
    version = _score(detector, scene, users, run_tasks, "2.0")
    outcomes = _outcomes(version)
    assert len(outcomes) == len(METRICS) * (1 + len(CLASSES))
    _, truth, detections = scene
    _check_against(outcomes, _cut_reference(tmp_path, truth, detections, "night"))
    assert "at night" in outcomes[("AP50", "car")].detail


@pytest.mark.parametrize("size", SIZES)
def test_every_metric_of_a_size_rule_is_judged_on_the_size_bucket(
    detector, scene, users, run_tasks, tmp_path, size
):
    criteria.set_criteria(detector, users["lead"], _every_metric(size=size))
    version = _score(detector, scene, users, run_tasks, "2.0")
    _, truth, detections = scene
    gt, dt = tmp_path / "gt.json", tmp_path / "dt.json"
    gt.write_text(json.dumps(truth))
    dt.write_text(json.dumps(detections))
    reference = _reference(pycocotools_eval(gt, dt), area=SIZES.index(size) + 1)
    outcomes = _outcomes(version)
    # The stored size AP of the mean is the mean of per-class APs: equal up to rounding.
    reference["mean"]["AP"] = outcomes[("AP", "mean")].value
    assert outcomes[("AP", "mean")].value == pytest.approx(
        _reference(pycocotools_eval(gt, dt), area=SIZES.index(size) + 1)["mean"]["AP"], abs=1e-9
    )
    _check_against(outcomes, reference)
    assert f"on {size} boxes" in outcomes[("recall", "mean")].detail


def _card(version):
    from evaluation.models import Scorecard
    from releases.models import PredictionSet

    files = PredictionSet.objects.filter(version=version).values("predictions_id")
    return Scorecard.objects.get(evaluation__predictions_id__in=files, protocol="coco")


def _old_rows(monkeypatch):
    """Score the way the platform did before per-slice AP50/AP75/recall: AP rows only."""
    original = evaluation_scoring.slice_rows

    def older(scorecard, result):
        stripped = {
            "slices": {
                kind: {
                    name: {
                        key: value
                        for key, value in entry.items()
                        if key in ("AP", "per_class", "images")
                    }
                    for name, entry in slices.items()
                }
                for kind, slices in result["slices"].items()
            }
        }
        return original(scorecard, stripped)

    monkeypatch.setattr(evaluation_scoring, "slice_rows", older)


def test_older_scorecards_are_completed_from_their_records(
    detector, scene, users, run_tasks, tmp_path, monkeypatch
):
    _old_rows(monkeypatch)
    criteria.set_criteria(detector, users["lead"], _every_metric(tag="night"))
    version = _score(detector, scene, users, run_tasks, "2.0")
    rows = SliceScore.objects.filter(scorecard=_card(version))
    assert rows.exists() and not rows.filter(all_metrics=True).exists()
    assert not rows.exclude(ap50=None).exists()
    _, truth, detections = scene
    _check_against(_outcomes(version), _cut_reference(tmp_path, truth, detections, "night"))


def test_older_scorecards_without_readable_records_are_missing_not_passed(
    detector, scene, users, run_tasks, monkeypatch
):
    _old_rows(monkeypatch)
    criteria.set_criteria(
        detector,
        users["lead"],
        [{"kind": "min_value", "metric": "AP50", "threshold": 0.99, "size": "small"}],
    )
    version = _score(detector, scene, users, run_tasks, "2.0")
    card = _card(version)
    with card.records.storage.open(card.records.name, "wb") as f:
        f.write(b"not the records any more")
    run_tasks(
        criteria.set_criteria,
        detector,
        users["lead"],
        [{"kind": "min_value", "metric": "AP50", "threshold": 0.0, "size": "small"}],
    )
    outcome = Outcome.objects.filter(version=version).order_by("-id").first()
    assert outcome.status == "missing"
    assert "predates per-slice AP50/AP75/recall" in outcome.detail
    assert "cannot be read" in outcome.detail and outcome.value is None


def test_a_tag_no_image_carries_is_said_so(detector, scene, users, run_tasks):
    criteria.set_criteria(
        detector,
        users["lead"],
        [{"kind": "min_value", "metric": "AP75", "threshold": 0.1, "tag": "fog"}],
    )
    version = _score(detector, scene, users, run_tasks, "2.0")
    outcome = Outcome.objects.get(version=version)
    assert outcome.status == "no data"
    assert "no image of harbour-loop" in outcome.detail and "'fog'" in outcome.detail


def _lose_small(detections, truth, category, share, seed):
    """Drop ``share`` of one class's detections whose box is small (w·h < 32², COCO)."""
    rng = np.random.default_rng(seed)
    return [
        d
        for d in detections
        if not (d["category_id"] == category and d["bbox"][2] * d["bbox"][3] < 32**2)
        or rng.random() > share
    ]


def test_a_significance_rule_on_a_size_bucket_bootstraps_that_bucket(
    detector, scene, users, run_tasks, settings
):
    settings.BENCHBOOK_BOOTSTRAP_RESAMPLES = 300
    _, truth, detections = scene
    baseline = _score(detector, scene, users, run_tasks, "1.0")
    services.sign_off(baseline, users["lead"], "approved", "baseline")
    rules = [
        {"kind": "no_significant_drop", "metric": "AP", "class": "pedestrian", "size": size}
        for size in ("small", "large")
    ]
    criteria.set_criteria(detector, users["lead"], rules)
    pedestrian = CLASSES.index("pedestrian") + 1
    candidate = _score(
        detector, scene, users, run_tasks, "1.1", _lose_small(detections, truth, pedestrian, 0.8, 3)
    )
    small, large = (
        Outcome.objects.get(version=candidate, rule__size=size) for size in ("small", "large")
    )
    assert small.status == "fail" and small.high < 0, small.detail
    assert "on small boxes" in small.detail and "95 % interval" in small.detail
    # No large detection was lost: the same numbers, a zero-width interval at zero.
    assert large.status == "pass" and large.value == large.baseline_value
    assert large.low == large.high == 0.0
    assert verdicts.verdict_of(candidate).state == "regression"


@pytest.mark.parametrize(
    "rule, path, message",
    [
        ({"size": "tiny"}, "rules[0].size", "must be a size bucket: one of small, medium, large"),
        ({"size": 3}, "rules[0].size", "must be a size bucket"),
        ({"size": "small", "tag": "night"}, "rules[0].size", "not both"),
        ({"tag": ""}, "rules[0].tag", "must be a non-empty image tag"),
    ],
)
def test_bad_slices_name_their_path_on_every_door(client, detector, users, rule, path, message):
    full = [{"kind": "min_value", "metric": "AP50", "threshold": 0.5, **rule}]
    with pytest.raises(criteria.CriteriaError) as caught:
        criteria.set_criteria(detector, users["lead"], full)
    assert caught.value.path == path and message in str(caught.value)
    response = _api(users["lead"]).post(
        f"/api/v1/detectors/{detector.pk}/criteria/", {"rules": full}, format="json"
    )
    assert response.status_code == 400 and response.json()["errors"][0]["path"] == path
    client.force_login(users["lead"])
    page = client.post(reverse("criteria", args=[detector.pk]), {"rules": json.dumps(full)})
    assert message in page.content.decode()
    assert not ReleaseCriteria.objects.exists()


@pytest.fixture
def size_regression(detector, scene, users, run_tasks):
    criteria.set_criteria(
        detector,
        users["lead"],
        [
            {
                "kind": "min_value",
                "metric": "recall",
                "class": "mean",
                "threshold": 0.99,
                "size": "small",
            }
        ],
    )
    version = _score(detector, scene, users, run_tasks, "3.0")
    assert verdicts.verdict_of(version).state == "regression"
    return version


def test_a_size_regression_blocks_the_api_the_page_and_the_command(client, size_regression, users):
    response = _api(users["lead"]).post(
        f"/api/v1/versions/{size_regression.pk}/sign-off/",
        {"decision": "approved", "comment": "ship"},
        format="json",
    )
    assert response.status_code in (400, 409), response.content
    assert "justification" in json.dumps(response.json())
    client.force_login(users["lead"])
    page = client.post(
        reverse("sign-off", args=[size_regression.pk]),
        {"decision": "approved", "comment": "ship"},
        follow=True,
    )
    assert "needs a written justification" in page.content.decode()
    from django.core.management import CommandError

    with pytest.raises(CommandError, match="is regression .*needs a written justification"):
        _command(size_regression, "approve")
    assert not SignOff.objects.exists()
    out = _command(size_regression, "approve", justification="small boxes not used on this route")
    assert "override" in out


def test_a_size_outcome_names_its_bucket_on_the_page_the_api_and_its_images_link(
    client, size_regression, users
):
    client.force_login(users["reviewer"])
    page = client.get(reverse("version", args=[size_regression.pk])).content.decode()
    assert "(small boxes)" in page and "recall of mean on small boxes" in page
    link = re.search(r'href="(/versions/[^"]*images[^"]*)"', page) or re.search(
        r'class="cause-link" href="([^"]*)"', page
    )
    assert "size=small" in link.group(1) and "metric=recall" not in link.group(1)
    assert client.get(link.group(1).replace("&amp;", "&")).status_code == 200
    body = _api(users["reviewer"]).get("/api/v1/outcomes/", {"version": size_regression.pk})
    rows = body.json()["results"] if "results" in body.json() else body.json()
    assert [r["rule"]["size"] for r in rows] == ["small"]
    assert "on small boxes" in rows[0]["detail"]
