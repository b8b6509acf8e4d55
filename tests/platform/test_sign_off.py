"""Sign-off: only a lead of the owning team, only when every evaluation finished, one
decision per version; approval makes the baseline; every decision is audited."""

import pytest
from django.core.exceptions import PermissionDenied
from django.urls import reverse

from evaluation.models import Evaluation
from releases import selectors, services
from releases.audit import verify_audit
from releases.models import AuditEvent, SignOff

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


@pytest.fixture
def scored_version(version, split, split_truth, users, run_tasks):
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    return version


def test_a_lead_approves_and_the_version_becomes_the_baseline(scored_version, users, detector):
    record, event = services.sign_off(scored_version, users["lead"], "approved", "good at night")
    assert selectors.baseline_of(detector) == scored_version
    assert (record.override, event.kind, event.actor) == (False, "signed off", "lead")
    assert {e["protocol"] for e in record.evidence["evaluations"]} == {"coco", "voc"}
    assert verify_audit()[0] is None


@pytest.mark.parametrize(
    "who, message",
    [
        ("engineer", "only leads of Shuttle Perception can"),
        ("reviewer", "only leads of Shuttle Perception can"),
        ("rival", "only leads of Shuttle Perception can"),
        ("outsider", "only leads of Shuttle Perception can"),
    ],
)
def test_only_a_lead_of_the_team_signs_off(scored_version, users, who, message):
    with pytest.raises(PermissionDenied, match=message):
        services.sign_off(scored_version, users[who], "approved", "looks fine")
    assert (
        SignOff.objects.count() == 0 and not AuditEvent.objects.filter(kind="signed off").exists()
    )


def test_no_sign_off_while_evaluations_are_pending(version, split, split_truth, users, monkeypatch):

    monkeypatch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
    services.submit_predictions(
        version, split, upload("p.json", detections_for(split_truth)), users["engineer"]
    )
    assert Evaluation.objects.filter(state="queued").count() == 2
    with pytest.raises(
        services.DecisionError, match="is scoring: a decision waits for the final verdict"
    ):
        services.sign_off(version, users["lead"], "approved", "hurry")
    assert SignOff.objects.count() == 0


def test_a_version_without_predictions_is_incomplete(version, users):
    """Nothing uploaded: incomplete; approving it is an override (issue 10)."""
    with pytest.raises(services.DecisionError, match="is incomplete .no predictions uploaded"):
        services.sign_off(version, users["lead"], "approved", "nothing to see")
    record, event = services.sign_off(
        version, users["lead"], "approved", "dry run", justification="registry test only"
    )
    assert record.override and record.verdict == "incomplete" and event.kind == "override"


def test_a_second_decision_is_refused(scored_version, users):
    services.sign_off(scored_version, users["lead"], "rejected", "pedestrians at night")
    before = AuditEvent.objects.count()
    with pytest.raises(services.DecisionError, match="already has a decision"):
        services.sign_off(scored_version, users["lead"], "approved", "changed my mind")
    assert SignOff.objects.get().decision == "rejected" and AuditEvent.objects.count() == before


def test_an_override_needs_a_justification(version, split, split_truth, users, run_tasks):
    from releases import criteria

    # A perfect AP is out of reach of these invented detections: the rule fails.
    rule = {"kind": "min_value", "metric": "AP", "class": "mean", "threshold": 1.0}
    criteria.set_criteria(version.detector, users["lead"], [rule])
    scored_version = run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    ).version
    with pytest.raises(
        services.DecisionError, match="is an override and needs a written justification"
    ):
        services.sign_off(scored_version, users["lead"], "approved", "ship it", justification="  ")
    assert SignOff.objects.count() == 0
    record, event = services.sign_off(
        scored_version,
        users["lead"],
        "approved",
        "ship it",
        justification="night route suspended until 1.6",
    )
    assert record.override and event.kind == "override"
    assert event.payload["justification"] == "night route suspended until 1.6"


def test_rejecting_needs_no_justification_and_sets_no_baseline(scored_version, users, detector):
    services.sign_off(scored_version, users["lead"], "rejected", "regression at night")
    assert selectors.baseline_of(detector) is None
    assert AuditEvent.objects.filter(kind="rejected").count() == 1


def test_sign_off_page(client, scored_version, users, detector):
    client.force_login(users["engineer"])
    page = client.get(reverse("version", args=[scored_version.pk])).content.decode()
    assert "Only a lead of Shuttle Perception can sign off" in page
    assert "do not replace, the safety validation" in page
    client.force_login(users["lead"])
    response = client.post(
        reverse("sign-off", args=[scored_version.pk]), {"decision": "approved", "comment": ""}
    )
    assert response.status_code == 302 and SignOff.objects.count() == 0
    client.post(
        reverse("sign-off", args=[scored_version.pk]), {"decision": "approved", "comment": "fine"}
    )
    page = client.get(reverse("version", args=[scored_version.pk])).content.decode()
    assert "badge-baseline" in page and "approved</strong> by lead" in page
    overview = client.get(reverse("overview")).content.decode()
    assert (
        f'>{scored_version.label}</a> <span class="badge badge-baseline">baseline</span>'
        in overview
    )
