"""Release criteria: validated, versioned and audited; judged after the last evaluation;
a regression is flagged only when the bootstrap interval excludes zero."""

import copy
import json

import numpy as np
import pytest
from django.core.exceptions import PermissionDenied

from evaluation import services as evaluation_services
from releases import criteria, judging_queue, services
from releases.models import AuditEvent, Outcome, ReleaseCriteria

from ..engine.synthetic import make_detections, make_split
from .conftest import CLASSES, upload

pytestmark = pytest.mark.django_db


@pytest.fixture
def big_split():
    rng = np.random.default_rng(77)
    split = make_split(
        rng, n_images=60, n_classes=3, boxes_per_image=6, crowd_rate=0.0, tags=("night",)
    )
    for category, name in zip(split["categories"], CLASSES):
        category["name"] = name
    detections = make_detections(rng, split, hit_rate=0.9, false_per_image=1, duplicate_rate=0.05)
    loaded = evaluation_services.load_split(
        name="bay-night", revision=3, truth=upload("b.json", split)
    )
    return loaded, split, detections


def _lose(detections, category, share, seed):
    """The same detector, having lost ``share`` of one class's detections."""
    rng = np.random.default_rng(seed)
    return [d for d in detections if d["category_id"] != category or rng.random() > share]


def _jitter(detections, seed):
    rng = np.random.default_rng(seed)
    out = copy.deepcopy(detections)
    for d in out:
        d["score"] = float(np.clip(d["score"] + rng.normal(0, 0.02), 0, 1))
    return out


@pytest.fixture
def with_baseline(detector, big_split, users, run_tasks, settings):
    settings.BENCHBOOK_BOOTSTRAP_RESAMPLES = 300
    split, _, detections = big_split
    baseline = services.create_version(detector, "1.4", users["engineer"])
    run_tasks(
        services.submit_predictions,
        baseline,
        split,
        upload("1.4.json", detections),
        users["engineer"],
    )
    services.sign_off(baseline, users["lead"], "approved", "baseline")
    return baseline


def _lost_pedestrians(detector, big_split, users, run_tasks):
    """Candidate 1.5: the baseline's detector with 60 % of its pedestrians lost, scored."""
    split, _, detections = big_split
    candidate = services.create_version(detector, "1.5", users["engineer"])
    pedestrian = CLASSES.index("pedestrian") + 1
    run_tasks(
        services.submit_predictions,
        candidate,
        split,
        upload("1.5.json", _lose(detections, pedestrian, 0.6, seed=1)),
        users["engineer"],
    )
    return candidate


RULES = [
    {"kind": "min_value", "metric": "AP50", "class": "pedestrian", "threshold": 0.8},
    {"kind": "max_drop", "metric": "AP", "class": "mean", "tolerance": 0.5},
    {"kind": "no_significant_drop", "metric": "AP", "class": "*", "confidence": 0.95},
]


def test_a_real_regression_is_flagged_and_needs_an_override(
    detector, big_split, users, run_tasks, with_baseline
):
    criteria.set_criteria(detector, users["lead"], RULES)
    candidate = _lost_pedestrians(detector, big_split, users, run_tasks)
    outcomes = {(o.rule_index, o.class_name): o for o in Outcome.objects.filter(version=candidate)}
    assert outcomes[(0, "pedestrian")].status == "fail"
    from releases import selectors

    assert (
        selectors.state_of(
            candidate, selectors.baseline_of(detector), selectors.blocked_versions([candidate])
        )
        == "blocked"
    )
    assert outcomes[(2, "pedestrian")].status == "fail"
    assert outcomes[(2, "pedestrian")].high < 0
    assert outcomes[(2, "car")].status in ("pass", "not significant")
    assert "95 % interval" in outcomes[(2, "pedestrian")].detail
    with pytest.raises(services.DecisionError, match="override and needs a written justification"):
        services.sign_off(candidate, users["lead"], "approved", "ship")
    record, event = services.sign_off(
        candidate, users["lead"], "approved", "ship", justification="pedestrian route closed"
    )
    assert record.override and {f["rule"] for f in record.failing_rules} >= {1, 3}


def test_a_small_noisy_drop_is_not_significant(
    detector, big_split, users, run_tasks, with_baseline
):
    criteria.set_criteria(detector, users["lead"], [RULES[2]])
    split, _, detections = big_split
    candidate = services.create_version(detector, "1.5", users["engineer"])
    run_tasks(
        services.submit_predictions,
        candidate,
        split,
        upload("1.5.json", _jitter(detections, 4)),
        users["engineer"],
    )
    statuses = {o.class_name: o.status for o in Outcome.objects.filter(version=candidate)}
    assert set(statuses) == set(CLASSES)
    assert "fail" not in statuses.values()
    dropped = [o for o in Outcome.objects.filter(version=candidate) if o.value < o.baseline_value]
    assert all(o.status == "not significant" and o.low < 0 < o.high for o in dropped)


def test_rules_without_a_baseline_have_no_data(detector, big_split, users, run_tasks):
    criteria.set_criteria(detector, users["lead"], RULES[1:2])
    split, _, detections = big_split
    version = services.create_version(detector, "0.1", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("0.1.json", detections),
        users["engineer"],
    )
    assert [o.status for o in Outcome.objects.filter(version=version)] == ["no data"]


def test_criteria_are_versioned_and_audited(detector, users):
    first = criteria.set_criteria(detector, users["lead"], RULES[:1])
    second = criteria.set_criteria(detector, users["lead"], RULES)
    assert (first.number, second.number) == (1, 2)
    assert criteria.current_criteria(detector) == second
    events = AuditEvent.objects.filter(kind="criteria changed")
    assert [e.payload["number"] for e in events] == [1, 2]


@pytest.mark.parametrize(
    "rule, message",
    [
        (
            {"kind": "min_value", "metric": "mAP", "threshold": 0.5},
            "rule 1: field 'metric': must be one of AP, AP50",
        ),
        (
            {"kind": "min_value", "class": "tram", "threshold": 0.5},
            "rule 1: field 'class': 'tram' is not",
        ),
        (
            {"kind": "min_value", "split": "harbour:9", "threshold": 0.5},
            "rule 1: field 'split': 'harbour:9' is not a benchmark split",
        ),
        (
            {"kind": "min_value", "threshold": 1.5},
            "rule 1: field 'threshold': must be a number in [0.0, 1.0]",
        ),
        (
            {"kind": "max_drop", "tolerance": -1},
            "rule 1: field 'tolerance': must be a number in [0.0, 100.0]",
        ),
        ({"kind": "max_drop"}, "rule 1: field 'tolerance': must be a number"),
        (
            {"kind": "no_significant_drop", "metric": "AP50"},
            "rule 1: field 'metric': a significance rule is computed on AP",
        ),
        ({"kind": "no_significant_drop", "confidence": 1.2}, "rule 1: field 'confidence'"),
        ({"kind": "sometimes"}, "rule 1: field 'kind': must be one of"),
        (
            {"kind": "min_value", "threshold": 0.5, "colour": "red"},
            "rule 1: field 'colour': unknown field",
        ),
    ],
)
def test_bad_rules_are_refused_and_nothing_is_stored(detector, users, rule, message):
    with pytest.raises(criteria.CriteriaError) as caught:
        criteria.set_criteria(detector, users["lead"], [rule])
    assert message in str(caught.value)
    assert ReleaseCriteria.objects.count() == 0
    assert not AuditEvent.objects.exclude(kind="suite changed").exists()  # suite v1 only


@pytest.mark.parametrize("who", ["engineer", "reviewer", "rival"])
def test_only_leads_change_criteria(detector, users, who):
    with pytest.raises(PermissionDenied, match="leads only"):
        criteria.set_criteria(detector, users[who], RULES)
    assert ReleaseCriteria.objects.count() == 0


def test_evidence_report_holds_rules_hashes_decision_and_chain(
    client, detector, big_split, users, run_tasks, with_baseline
):
    criteria.set_criteria(detector, users["lead"], RULES)
    split, _, _ = big_split
    candidate = _lost_pedestrians(detector, big_split, users, run_tasks)
    services.sign_off(candidate, users["lead"], "approved", "ship", justification="route closed")
    client.force_login(users["reviewer"])
    report = client.get(f"/versions/{candidate.pk}/evidence.json").json()
    assert report["sign_off"]["override"] and report["sign_off"]["justification"] == "route closed"
    assert report["audit"]["chain_intact"] and len(report["audit"]["head"]) == 64
    assert report["splits"][0]["split_sha256"] == split.sha256
    pedestrian = next(c for c in report["splits"][0]["classes"] if c["class"] == "pedestrian")
    assert pedestrian["delta_AP_interval"][1] < 0
    assert any(o["status"] == "fail" for o in report["outcomes"])
    assert "do not replace, the safety validation" in report["caution"]
    page = client.get(f"/versions/{candidate.pk}/evidence/").content.decode()
    assert "override" in page and split.sha256 in page and "Chain intact" in page
    client.force_login(users["rival"])
    assert client.get(f"/versions/{candidate.pk}/evidence.json").status_code == 404


def test_criteria_page(client, detector, users):
    client.force_login(users["lead"])
    url = f"/detectors/{detector.pk}/criteria/"
    bad = client.post(url, {"rules": '[{"kind": "min_value", "metric": "mAP", "threshold": 0.5}]'})
    assert bad.status_code == 400 and "rule 1: field &#x27;metric&#x27;" in bad.content.decode()
    broken = client.post(url, {"rules": "[{"})
    assert broken.status_code == 400 and "rules: not valid JSON" in broken.content.decode()
    assert client.post(url, {"rules": json.dumps(RULES)}).status_code == 302
    assert criteria.current_criteria(detector).number == 1
    client.force_login(users["engineer"])
    page = client.get(url).content.decode()
    assert "Only leads of Shuttle Perception edit the criteria" in page
    assert client.post(url, {"rules": json.dumps(RULES)}).status_code == 403


def test_compare_shows_the_judged_intervals(
    client, detector, big_split, users, run_tasks, with_baseline
):
    criteria.set_criteria(detector, users["lead"], [RULES[2]])
    _lost_pedestrians(detector, big_split, users, run_tasks)
    client.force_login(users["lead"])
    response = client.get(f"/detectors/{detector.pk}/compare/")
    assert response.context["reference"] == with_baseline
    rows = {d["class"]: d for d in response.context["splits"][0]["deltas"]}
    low, high, confidence = rows["pedestrian"]["interval"]
    assert low <= rows["pedestrian"]["delta"] <= high or high < 0
    assert high < 0 and confidence == 0.95


def test_judging_lost_with_the_broker_is_queued_again(
    detector, split, split_truth, users, run_tasks, monkeypatch, settings
):
    """The broker refuses the judge task: the verdict stays judging until the sweep."""
    from releases import tasks as release_tasks
    from releases import verdicts

    from .conftest import detections_for

    version = services.create_version(detector, "2.0", users["engineer"])
    judged = release_tasks.judge.delay

    def broker_down(*args):
        raise ConnectionError("broker down")

    monkeypatch.setattr(release_tasks.judge, "delay", broker_down)
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    version.refresh_from_db()
    assert verdicts.verdict_of(version).state == "judging"
    assert judging_queue.requeue_unjudged() == []  # within the grace period: left alone
    settings.BENCHBOOK_QUEUED_GRACE_SECONDS = 0
    monkeypatch.setattr(release_tasks.judge, "delay", judged)
    assert run_tasks(judging_queue.requeue_unjudged) == [version.pk]
    version.refresh_from_db()
    verdict = verdicts.verdict_of(version)
    assert (verdict.state, verdict.no_criteria) == ("pass", True)
    assert judging_queue.requeue_unjudged() == []  # judged after its last evaluation
