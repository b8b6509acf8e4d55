"""Every entry point of a decision goes through ``services.sign_off`` and keeps its
promise: no plain approval of a candidate that is not final, or not a pass.

Entry points tried: the page form, the API, the admin (read-only), the benchmark
suite's page-independent API, the ``sign_off`` management command; the pipeline client
has no sign-off (its exit codes are in test_client.py).
"""

import pytest
from django.urls import reverse
from rest_framework.test import APIClient

from releases import criteria, services, suites, verdicts
from releases import judging as gate_judging
from releases import tasks as release_tasks
from releases.audit import verify_audit
from releases.models import (
    AuditEvent,
    BenchmarkSuite,
    Judgement,
    Notification,
    Outcome,
    SignOff,
)

from .conftest import detections_for, in_process, split_dict, upload

pytestmark = pytest.mark.django_db
API = "/api/v1/"
IMPOSSIBLE = {"kind": "min_value", "metric": "AP", "class": "mean", "split": "*", "threshold": 1.0}


@pytest.fixture
def judging(version, split, split_truth, users, run_tasks, monkeypatch):
    """Scored, its judging not recorded yet."""
    criteria.set_criteria(version.detector, users["lead"], [IMPOSSIBLE])
    monkeypatch.setattr(release_tasks.judge, "delay", lambda *args: None)
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    assert verdicts.verdict_of(version).state == "judging"
    return version


def _api(user):
    from releases import tokens

    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(user, 't')[1]}")
    return client


def test_the_page_form_refuses_while_judging_and_without_justification(client, judging, users):
    client.force_login(users["lead"])
    url = reverse("sign-off", args=[judging.pk])
    page = client.post(url, {"decision": "approved", "comment": "ship"}, follow=True)
    assert "is judging: a decision waits for the final verdict" in page.content.decode()
    gate_judging.judge(judging.pk)
    page = client.post(url, {"decision": "approved", "comment": "ship"}, follow=True)
    assert "needs a written justification" in page.content.decode()
    assert SignOff.objects.count() == 0
    client.post(url, {"decision": "approved", "comment": "ship", "justification": "trial only"})
    assert SignOff.objects.get().override


def test_the_api_refuses_while_judging_and_without_justification(judging, users):
    lead = _api(users["lead"])
    url = f"{API}versions/{judging.pk}/sign-off/"
    refused = lead.post(url, {"decision": "approved", "comment": "ship"}, format="json")
    assert refused.status_code == 409
    assert "is judging" in refused.json()["message"] and refused.json()["code"] == "not_allowed"
    verdict = lead.get(f"{API}versions/{judging.pk}/verdict/").json()
    assert (verdict["state"], verdict["final"], verdict["judgement"]) == ("judging", False, None)
    gate_judging.judge(judging.pk)
    refused = lead.post(url, {"decision": "approved", "comment": "ship"}, format="json")
    assert refused.status_code == 409 and "is regression" in refused.json()["message"]
    assert SignOff.objects.count() == 0
    done = lead.post(
        url,
        {"decision": "approved", "comment": "ship", "justification": "trial only"},
        format="json",
    )
    assert done.status_code == 201 and done.json()["override"] is True
    assert done.json()["verdict"] == "regression"
    assert done.json()["judgement"] == verdicts.verdict_of(judging).judgement.pk


@pytest.mark.parametrize("model", [SignOff, Judgement, Outcome, BenchmarkSuite, Notification])
def test_the_admin_cannot_add_change_or_delete_decisions(client, judging, users, model):
    from django.contrib.auth import get_user_model

    gate_judging.judge(judging.pk)
    services.sign_off(judging, users["lead"], "rejected", "night regression")
    row = model.objects.order_by("pk").first()
    admin = get_user_model().objects.create_superuser("root", password="pw-root")
    client.force_login(admin)
    name = f"admin:releases_{model._meta.model_name}"
    assert client.get(reverse(f"{name}_changelist")).status_code == 200
    assert client.get(reverse(f"{name}_add")).status_code == 403
    before = model.objects.count()
    assert client.post(reverse(f"{name}_delete", args=[row.pk]), {"post": "yes"}).status_code == 403
    change = client.post(reverse(f"{name}_change", args=[row.pk]), {"decision": "approved"})
    assert change.status_code in (200, 403)  # a read-only view, never a saved change
    assert model.objects.count() == before
    assert SignOff.objects.get().decision == "rejected"


def test_suite_api_validates_audits_and_rejudges(
    detector, judging, split, users, run_tasks, monkeypatch
):
    """A lead sets the suite through the API: errors name the field; the new version is
    audited and undecided candidates are judged again."""
    monkeypatch.setattr(release_tasks.judge, "delay", in_process(release_tasks.judge))
    day = split_dict(seed=9)
    from evaluation import services as evaluation_services

    evaluation_services.load_split(name="bay-day", revision=1, truth=upload("d.json", day))
    lead = _api(users["lead"])
    url = f"{API}detectors/{detector.pk}/suite/"
    bad = lead.post(url, {"splits": [{"name": "bay-night", "revision": 7}]}, format="json")
    assert bad.status_code == 400 and bad.json()["errors"][0]["path"] == "splits[0].revision"
    assert "bay-night has no revision 7" in bad.json()["message"]
    bad = lead.post(
        url, {"splits": ["bay-night"], "class_thresholds": {"tram": 0.4}}, format="json"
    )
    assert bad.status_code == 400 and bad.json()["errors"][0]["path"] == "class_thresholds.tram"
    refused = _api(users["engineer"]).post(url, {"splits": ["bay-night"]}, format="json")
    assert refused.status_code == 403
    assert BenchmarkSuite.objects.filter(detector=detector).count() == 1

    saved = run_tasks(
        lead.post,
        url,
        {
            "splits": ["bay-night", "bay-day"],
            "protocols": ["coco", "voc"],
            "score_threshold": 0.4,
            "class_thresholds": {"pedestrian": 0.3},
        },
        format="json",
    )
    assert saved.status_code == 201, saved.json()
    assert saved.json()["number"] == 2 and len(saved.json()["required"]) == 2
    history = lead.get(url).json()
    assert [s["number"] for s in history] == [2, 1]
    first, event = AuditEvent.objects.filter(kind="suite changed").order_by("id")
    assert (first.payload["number"], event.payload["number"]) == (1, 2)  # v1 at creation
    assert event.payload["suite"]["class_thresholds"] == {"pedestrian": 0.3}
    verdict = verdicts.verdict_of(judging)  # judged again by the suite change
    assert verdict.state == "incomplete" and verdict.reasons == ["no predictions on bay-day rev 1"]
    judgements = lead.get(f"{API}versions/{judging.pk}/judgements/").json()
    assert judgements[0]["suite_version"] == 2 and judgements[0]["verdict"] == "incomplete"
    assert verify_audit()[0] is None


def test_a_suite_change_requests_the_new_protocols_evaluations(
    detector, version, split, split_truth, users, run_tasks
):
    from evaluation.models import Evaluation

    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    assert set(Evaluation.objects.values_list("protocol", flat=True)) == {"coco", "voc"}
    run_tasks(
        suites.set_suite, detector, users["lead"], {"splits": ["bay-night"], "protocols": ["voc07"]}
    )
    assert set(Evaluation.objects.values_list("protocol", flat=True)) == {"coco", "voc", "voc07"}
    verdict = verdicts.verdict_of(version)
    assert verdict.state == "pass" and [e.protocol for e in verdict.evaluations] == ["voc07"]
    detector.refresh_from_db()
    assert (detector.primary_protocol, detector.protocols) == ("voc07", ["voc07"])


def test_outcomes_api_reads_the_newest_judgement_and_keeps_the_older(
    detector, version, split, split_truth, users, run_tasks
):
    easy = {**IMPOSSIBLE, "threshold": 0.0}
    run_tasks(criteria.set_criteria, detector, users["lead"], [easy])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    run_tasks(criteria.set_criteria, detector, users["lead"], [IMPOSSIBLE])
    old, new = Judgement.objects.filter(version=version).order_by("id")
    lead = _api(users["lead"])
    current = lead.get(f"{API}outcomes/", {"version": version.pk}).json()["results"]
    assert [(o["judgement"], o["status"]) for o in current] == [(new.pk, "fail")]
    earlier = lead.get(f"{API}outcomes/", {"judgement": old.pk}).json()["results"]
    assert [(o["judgement"], o["status"]) for o in earlier] == [(old.pk, "pass")]
    listed = lead.get(f"{API}versions/{version.pk}/judgements/").json()
    assert [(j["id"], j["verdict"]) for j in listed] == [(new.pk, "regression"), (old.pk, "pass")]


# The management command ---------------------------------------------------------------


def _command(version, decision, user="lead", **extra):
    from django.core.management import call_command

    args = ["sign_off", str(version.pk), "--decision", decision, "--user", user]
    args += ["--comment", extra.pop("comment", "from the shell")]
    for key, value in extra.items():
        args += [f"--{key}", value]
    out = __import__("io").StringIO()
    call_command(*args, stdout=out)
    return out.getvalue()


def test_the_command_refuses_judging_and_unjustified_overrides(judging, users):
    """``manage.py sign_off`` is one more door to the same ``services.sign_off``:
    judging is refused, approving a regression needs a justification and is then an
    override; nothing is stored by a refusal."""
    from django.core.management import CommandError

    before = AuditEvent.objects.count()
    with pytest.raises(CommandError, match="is judging: a decision waits"):
        _command(judging, "approve", justification="trial only")
    with pytest.raises(CommandError, match="only leads of Shuttle Perception can"):
        _command(judging, "approve", user="engineer")
    with pytest.raises(CommandError, match="--user: no user 'nobody'"):
        _command(judging, "approve", user="nobody")
    gate_judging.judge(judging.pk)
    with pytest.raises(CommandError, match="is regression .*needs a written justification"):
        _command(judging, "approve")
    with pytest.raises(CommandError, match="is regression .*needs a written justification"):
        _command(judging, "approve", justification="   ")
    assert SignOff.objects.count() == 0 and AuditEvent.objects.count() == before + 1  # judged
    out = _command(judging, "approve", justification="trial on the depot loop only")
    assert "override by lead on verdict regression" in out
    record = SignOff.objects.get()
    assert (record.override, record.verdict, record.decision) == (True, "regression", "approved")
    assert AuditEvent.objects.order_by("-id").first().kind == "override"
    with pytest.raises(CommandError, match="already has a decision"):
        _command(judging, "reject")
    assert verify_audit()[0] is None


def test_the_command_refuses_an_incomplete_candidate_without_justification(
    detector, version, split, split_truth, users, run_tasks
):
    """Uploaded on one of two required splits: incomplete, naming the missing split;
    approval without justification is refused, rejection needs only the comment."""
    from django.core.management import CommandError

    from evaluation import services as evaluation_services

    evaluation_services.load_split(
        name="bay-day", revision=1, truth=upload("d.json", split_dict(seed=9))
    )
    suites.set_suite(detector, users["lead"], {"splits": ["bay-night", "bay-day"]})
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    assert verdicts.verdict_of(version).state == "incomplete"
    with pytest.raises(CommandError, match="is incomplete \\(no predictions on bay-day rev 1"):
        _command(version, "approve")
    assert SignOff.objects.count() == 0
    out = _command(version, "reject", comment="upload the day split")
    assert "rejected by lead on verdict incomplete" in out
    assert SignOff.objects.get().override is False
