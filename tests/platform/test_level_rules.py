"""Release rules on a difficulty level (``"level": "moderate"``, releases/level_rules.py):
validated against the suite (errors name ``rules[i].level``), judged on the stored
kitti2d result by the one gate (``judging.judge``), a missing level result is a
*missing* outcome that keeps the verdict from passing, through every entry point (the
service, the API, the criteria page, the sign-off command, the client's exit code).
Values are the kitti2d scorecard's, checked against the KITTI devkit transliteration
in test_level_protocols.py."""

import io

import pytest
from django.core.management import CommandError, call_command
from django.urls import reverse
from rest_framework.test import APIClient

from evaluation.models import Evaluation
from releases import criteria, services, suites, verdicts
from releases import tasks as release_tasks
from releases.client.__main__ import exit_of
from releases.models import Outcome, ReleaseCriteria, SignOff

from ..engine.test_difficulty import _write
from . import test_level_protocols
from .conftest import upload

_zip = test_level_protocols._zip
road = test_level_protocols.road  # the fixture: a KITTI label split, coco + kitti2d

pytestmark = pytest.mark.django_db
API = "/api/v1/"


def _rule(**extra):
    return {"kind": "min_value", "level": "moderate", "class": "mean", "split": "*", **extra}


def _api(user):
    from releases import tokens

    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(user, 't')[1]}")
    return client


def _submit(road, run_tasks, users, version=None, predictions=None):
    run_tasks(
        services.submit_predictions,
        version or road["version"],
        road["split"],
        upload("dets.zip", predictions or road["predictions"]),
        users["engineer"],
    )


def _moderate(version):
    card = Evaluation.objects.get(protocol="kitti2d", prediction_sets__version=version).scorecard
    return card.summary["AP"]


def test_a_level_rule_passes_or_fails_on_the_moderate_number(road, users, run_tasks):
    criteria.set_criteria(road["detector"], users["lead"], [_rule(threshold=0.0)])
    _submit(road, run_tasks, users)
    moderate = _moderate(road["version"])
    assert 0 < moderate < 1
    verdict = verdicts.verdict_of(road["version"])
    assert verdict.state == "pass", verdict.reasons
    outcome = Outcome.objects.get()
    assert outcome.value == pytest.approx(moderate, abs=1e-12)
    assert "AP of mean at moderate (kitti2d)" in outcome.detail
    above = round(moderate + 0.01, 3)
    run_tasks(criteria.set_criteria, road["detector"], users["lead"], [_rule(threshold=above)])
    verdict = verdicts.verdict_of(road["version"])
    assert verdict.state == "regression"
    assert verdict.reasons == [Outcome.objects.order_by("-id").first().detail]
    assert f"minimum {above:.3f}" in verdict.reasons[0]


def test_every_class_rule_covers_the_classes_the_protocol_evaluates(road, users, run_tasks):
    criteria.set_criteria(road["detector"], users["lead"], [_rule(threshold=0.0, **{"class": "*"})])
    _submit(road, run_tasks, users)
    assert verdicts.verdict_of(road["version"]).state == "pass"
    assert sorted(Outcome.objects.values_list("class_name", flat=True)) == [
        "Car",
        "Cyclist",
        "Pedestrian",
    ]  # van, person_sitting and truck are not kitti2d classes


def test_a_drop_at_moderate_against_the_baseline_fails(road, users, run_tasks, tmp_path):
    criteria.set_criteria(road["detector"], users["lead"], [_rule(kind="max_drop", tolerance=1.0)])
    _submit(road, run_tasks, users)
    run_tasks(services.sign_off, road["version"], users["lead"], "approved", "baseline")
    worse = [[d for d in dets if d[0] != "Car"] for dets in road["detections"]]
    _write(tmp_path / "worse", road["scenes"], worse)
    candidate = services.create_version(road["detector"], "1.1", users["engineer"])
    _submit(road, run_tasks, users, candidate, _zip(tmp_path / "worse_det"))
    before, after = _moderate(road["version"]), _moderate(candidate)
    assert after < before - 0.01  # no car detections: car AP 0 at every level
    verdict = verdicts.verdict_of(candidate)
    assert verdict.state == "regression"
    outcome = Outcome.objects.get(version=candidate)
    assert (outcome.value, outcome.baseline_value) == (
        pytest.approx(after, abs=1e-12),
        pytest.approx(before, abs=1e-12),
    )
    assert f"drop {100 * (before - after):.2f} points, allowed 1.00" in outcome.detail


@pytest.mark.parametrize(
    "rule, path, message",
    [
        (_rule(level="extreme", threshold=0.5), "rules[0].level", "not a level of a protocol"),
        (_rule(level=3, threshold=0.5), "rules[0].level", "must be the name of a level"),
        (_rule(metric="AP50", threshold=0.5), "rules[0].metric", "measured as AP"),
        (_rule(kind="no_change"), "rules[0].kind", "must be one of"),
        (_rule(size="small", threshold=0.5), "rules[0].size", "cannot name a size bucket"),
        (_rule(tag="", threshold=0.5), "rules[0].tag", "non-empty image tag"),
        (_rule(kind="no_significant_drop", confidence=2), "rules[0].confidence", r"\[0.5, 0.999\]"),
    ],
)
def test_bad_level_rules_are_refused_naming_the_field(road, users, rule, path, message):
    with pytest.raises(criteria.CriteriaError, match=message) as e:
        criteria.set_criteria(road["detector"], users["lead"], [rule])
    assert e.value.path == path
    assert not ReleaseCriteria.objects.filter(detector=road["detector"]).exists()


def test_a_suite_without_a_level_protocol_refuses_a_level_rule(detector, split, users):
    with pytest.raises(criteria.CriteriaError, match="names no level protocol") as e:
        criteria.set_criteria(detector, users["lead"], [_rule(threshold=0.1)])
    assert e.value.path == "rules[0].level"


def test_the_api_and_the_page_refuse_a_bad_level_rule(road, users, client):
    lead = _api(users["lead"])
    url = f"{API}detectors/{road['detector'].pk}/criteria/"
    refused = lead.post(url, {"rules": [_rule(level="extreme", threshold=0.5)]}, format="json")
    assert refused.status_code == 400
    assert "rules[0].level" in str(refused.json())
    saved = lead.post(url, {"rules": [_rule(threshold=0.5)]}, format="json")
    assert saved.status_code == 201, saved.json()
    client.force_login(users["lead"])
    page = client.post(
        reverse("criteria", args=[road["detector"].pk]),
        {"rules": '[{"kind": "min_value", "level": "extreme", "threshold": 0.5}]'},
        follow=True,
    ).content.decode()
    assert "field &#x27;level&#x27;" in page or "field 'level'" in page
    assert ReleaseCriteria.objects.filter(detector=road["detector"]).count() == 1


def test_a_missing_level_result_is_never_a_pass(road, users, run_tasks):
    """The suite drops kitti2d after the rule was set: the rule's outcome is *missing*,
    the verdict incomplete, and every door refuses a plain approval."""
    criteria.set_criteria(road["detector"], users["lead"], [_rule(threshold=0.0)])
    _submit(road, run_tasks, users)
    assert verdicts.verdict_of(road["version"]).state == "pass"
    run_tasks(
        suites.set_suite,
        road["detector"],
        users["lead"],
        {"splits": ["kerb-road"], "protocols": ["coco"]},
    )
    verdict = verdicts.verdict_of(road["version"])
    assert verdict.state == "incomplete"
    assert "the suite names no protocol with level 'moderate'" in verdict.reasons[0]
    assert Outcome.objects.order_by("-id").first().status == "missing"
    api = _api(users["lead"]).get(f"{API}versions/{road['version'].pk}/verdict/").json()
    assert api["state"] == "incomplete"
    assert exit_of(api) == 3  # the pipeline client's exit code for a blocked version
    with pytest.raises(CommandError, match="is incomplete .*needs a written justification"):
        call_command(
            "sign_off",
            str(road["version"].pk),
            "--decision",
            "approve",
            "--user",
            "lead",
            "--comment",
            "ship",
            stdout=io.StringIO(),
        )
    refused = _api(users["lead"]).post(
        f"{API}versions/{road['version'].pk}/sign-off/",
        {"decision": "approved", "comment": "ship"},
        format="json",
    )
    assert refused.status_code == 409 and SignOff.objects.count() == 0


def test_while_the_level_evaluation_is_queued_the_version_is_not_judged(
    road, users, run_tasks, monkeypatch
):
    """Worker after request: the kitti2d evaluation not run yet keeps the version in
    ``scoring``; once it runs, the rule is judged on its number."""
    from evaluation import tasks

    criteria.set_criteria(road["detector"], users["lead"], [_rule(threshold=0.0)])
    held = []
    real = tasks.score.delay

    def delay(evaluation_id):
        if Evaluation.objects.get(pk=evaluation_id).protocol == "kitti2d":
            held.append(evaluation_id)
        else:
            real(evaluation_id)

    monkeypatch.setattr(tasks.score, "delay", delay)
    _submit(road, run_tasks, users)
    assert held and verdicts.verdict_of(road["version"]).state == "scoring"
    assert not Outcome.objects.exists()
    monkeypatch.setattr(release_tasks.judge, "delay", release_tasks.judge.delay)
    run_tasks(real, held[0])
    assert verdicts.verdict_of(road["version"]).state == "pass"
    assert Outcome.objects.get().value == pytest.approx(_moderate(road["version"]))


def test_the_compare_page_shows_level_deltas(road, users, run_tasks, tmp_path, client):
    _submit(road, run_tasks, users)
    worse = [[d for d in dets if d[0] != "Car"] for dets in road["detections"]]
    _write(tmp_path / "worse", road["scenes"], worse)
    candidate = services.create_version(road["detector"], "1.1", users["engineer"])
    _submit(road, run_tasks, users, candidate, _zip(tmp_path / "worse_det"))
    from releases import selectors

    entry = selectors.compare_versions(road["version"], candidate)[0]
    (table,) = entry["levels"]
    assert table["protocol"] == "kitti2d" and table["levels"] == ["easy", "moderate", "hard"]
    mean = table["rows"][0]
    assert mean["class"] == "mean"
    delta = _moderate(candidate) - _moderate(road["version"])
    assert mean["cells"][1]["delta"] == pytest.approx(delta, abs=1e-12) and delta < 0
    client.force_login(users["reviewer"])
    page = client.get(
        reverse("compare", args=[road["detector"].pk]),
        {"reference": road["version"].pk, "candidate": candidate.pk},
    ).content.decode()
    assert f'id="level-deltas-kitti2d-{road["split"].pk}"' in page
    # The API gives the same deltas by level and by size bucket (the client's source).
    body = (
        _api(users["reviewer"])
        .get(f"{API}comparisons/", {"reference": road["version"].pk, "candidate": candidate.pk})
        .json()
    )
    (split,) = body["splits"]
    (level_table,) = split["levels"]
    assert level_table["protocol"] == "kitti2d" and level_table["lower_is_better"] is False
    assert level_table["rows"][0]["cells"][1]["delta"] == pytest.approx(delta, abs=1e-12)
    sizes = {row["size"]: row["cells"] for row in split["sizes"]}
    assert set(sizes) == {"small", "medium", "large"}
    assert sizes["small"] == [
        {**cell, "interval": None if cell["interval"] is None else list(cell["interval"])}
        for cell in entry["sizes"][0]["cells"]
    ]
