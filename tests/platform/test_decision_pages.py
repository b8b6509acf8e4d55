# ruff: noqa: F811  (fixtures imported from test_criteria are parameters here)
"""The pages of the decision: the version page starts with the verdict and the sign-off
form; the overview lists candidates by verdict; leads edit the suite and create
detectors on pages that call the same services as the API."""

import json
import re

import pytest

from releases import criteria, services, suites
from releases.models import AuditEvent, BenchmarkSuite, Detector

from .conftest import detections_for, upload
from .test_criteria import RULES, _lost_pedestrians, big_split, with_baseline  # noqa: F401

pytestmark = pytest.mark.django_db


def _position(html, marker):
    at = html.find(marker)
    assert at >= 0, marker
    return at


def test_the_version_page_starts_with_the_verdict_and_the_form(
    client, detector, big_split, users, run_tasks, with_baseline
):
    criteria.set_criteria(detector, users["lead"], RULES)
    candidate = run_tasks(_lost_pedestrians, detector, big_split, users, run_tasks)
    client.force_login(users["lead"])
    html = client.get(f"/versions/{candidate.pk}/").content.decode()
    verdict = _position(html, 'id="verdict-state">regression<')
    deciding = _position(html, 'id="outcomes"')
    form = _position(html, 'id="sign-off-form"')
    folded = _position(html, 'id="outcomes-folded"')
    first_split = _position(html, 'id="split-')
    assert verdict < deciding < form < folded < first_split
    # What decides it holds only failing or missing outcomes; passes are folded.
    table = html[deciding : html.find("</table>", deciding)]
    statuses = re.findall(r'class="badge badge-([a-z-]+)"', table)
    assert statuses and set(statuses) <= {"fail", "missing"}
    rest = html[folded : html.find("</details>", folded)]
    assert "badge-pass" in rest and "badge-fail" not in rest
    # The caution is beside the form, and an approval is said to need a justification.
    assert _position(html, 'class="caution"') < folded
    assert "required to approve" in html and "the verdict is regression" in html


def test_no_form_before_the_verdict_is_final(
    client, detector, split, split_truth, users, monkeypatch
):
    version = services.create_version(detector, "2.0", users["engineer"])
    monkeypatch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)  # never scored
    services.submit_predictions(
        version, split, upload("p.json", detections_for(split_truth)), users["engineer"]
    )
    client.force_login(users["lead"])
    html = client.get(f"/versions/{version.pk}/").content.decode()
    assert 'id="verdict-state">scoring<' in html and 'id="sign-off-form"' not in html
    assert "Sign-off opens when the verdict is final" in html


def test_earlier_judgements_stay_readable(
    client, detector, big_split, users, run_tasks, with_baseline
):
    criteria.set_criteria(detector, users["lead"], RULES)
    candidate = run_tasks(_lost_pedestrians, detector, big_split, users, run_tasks)
    first = candidate.judgements.get()
    run_tasks(criteria.set_criteria, detector, users["lead"], RULES[1:2])  # re-judged
    assert candidate.judgements.count() == 2
    client.force_login(users["reviewer"])
    html = client.get(f"/versions/{candidate.pk}/").content.decode()
    assert f'href="?judgement={first.pk}#verdict"' in html
    old = client.get(f"/versions/{candidate.pk}/?judgement={first.pk}").content.decode()
    assert "Showing an earlier judgement" in old and "min_value" in old


def test_the_overview_lists_candidates_by_verdict(
    client, detector, big_split, users, run_tasks, with_baseline
):
    criteria.set_criteria(detector, users["lead"], RULES)
    candidate = run_tasks(_lost_pedestrians, detector, big_split, users, run_tasks)
    client.force_login(users["engineer"])
    html = client.get("/").content.decode()
    assert f'>{candidate.label}</a> <span class="badge badge-regression">regression</span>' in html
    history = client.get(f"/detectors/{detector.pk}/").content.decode()
    assert 'badge-regression">regression' in history and 'badge-baseline">baseline' in history


SUITE = {
    "splits": [{"name": "bay-night", "revision": None}],
    "protocols": ["coco", "voc"],
    "box_policy": "keep",
    "score_threshold": 0.4,
    "class_thresholds": {"pedestrian": 0.3},
}


def test_leads_edit_the_suite_with_history_and_diff(client, detector, split, users):
    url = f"/detectors/{detector.pk}/suite/"
    client.force_login(users["engineer"])
    page = client.get(url).content.decode()
    assert "Only leads of Shuttle Perception edit the suite" in page
    refused = client.post(url, {"suite": json.dumps(SUITE)})
    assert refused.status_code == 403 and "leads only" in refused.content.decode()

    client.force_login(users["lead"])
    before = BenchmarkSuite.objects.filter(detector=detector).count()
    bad = client.post(url, {"suite": json.dumps({**SUITE, "box_policy": "shrink"})})
    assert bad.status_code == 400 and "box_policy" in bad.content.decode()
    broken = client.post(url, {"suite": "{"})
    assert broken.status_code == 400 and "suite: not valid JSON" in broken.content.decode()
    assert BenchmarkSuite.objects.filter(detector=detector).count() == before
    assert client.post(url, {"suite": json.dumps(SUITE)}).status_code == 302
    current = suites.current_suite(detector)
    assert current.number == before + 1 and current.score_threshold == 0.4
    html = client.get(url).content.decode()
    assert f'id="suite-v{current.number}"' in html and 'class="diff-added"' in html
    assert AuditEvent.objects.filter(
        kind="suite changed", subject=f"detector:{detector.pk}"
    ).exists()


def _one_audited_suite(detector, user):
    """A new detector has exactly one suite version, v1, written to the audit trail by
    the lead who created it (it used to leave an unaudited v1 and an audited v2)."""
    from releases.audit import verify_audit
    from releases.models import AuditEvent

    assert list(detector.suites.values_list("number", flat=True)) == [1]
    events = AuditEvent.objects.filter(kind="suite changed", subject=f"detector:{detector.pk}")
    assert [(e.actor, e.payload["number"]) for e in events] == [(user.username, 1)]
    assert events.get().payload["suite"] == suites.as_dict(suites.current_suite(detector))
    assert verify_audit()[0] is None


def test_a_lead_creates_a_detector_with_its_suite(client, team, split, users):
    client.force_login(users["engineer"])
    refused = client.get("/detectors/new/")
    assert refused.status_code == 403 and "only leads of a team" in refused.content.decode()

    client.force_login(users["lead"])
    form = {
        "team": team.pk,
        "name": "Rear camera",
        "classes": "car\npedestrian, cyclist",
        "description": "Reversing camera.",
        "suite": json.dumps(SUITE),
    }
    unknown = client.post(
        "/detectors/new/", {**form, "suite": json.dumps({**SUITE, "splits": ["harbour-fog"]})}
    )
    assert unknown.status_code == 400 and "splits[0]" in unknown.content.decode()
    twice = client.post("/detectors/new/", {**form, "classes": "car\ncar"})
    assert (
        twice.status_code == 400
        and "classes[1]: &#x27;car&#x27; is listed twice" in twice.content.decode()
    )
    assert not Detector.objects.filter(name="Rear camera").exists()  # nothing half-stored

    created = client.post("/detectors/new/", form)
    detector = Detector.objects.get(name="Rear camera")
    assert created.status_code == 302 and created.url == f"/detectors/{detector.pk}/"
    assert detector.classes == ["car", "pedestrian", "cyclist"] and detector.team == team
    suite = suites.current_suite(detector)
    assert suite.protocols == ["coco", "voc"] and suite.class_thresholds == {"pedestrian": 0.3}
    assert [s.pk for s in suites.required_splits(detector)] == [split.pk]
    _one_audited_suite(detector, users["lead"])
    again = client.post("/detectors/new/", form)
    assert again.status_code == 400 and "already has a detector called" in again.content.decode()


def test_the_api_creates_a_detector_as_the_page_does(team, split, users, rival_detector):
    from django.core.cache import cache
    from rest_framework.test import APIClient

    from releases import tokens

    cache.clear()

    def client_of(name):
        client = APIClient()
        client.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(users[name], 'ci')[1]}")
        return client

    body = {
        "team": team.pk,
        "name": "Rear camera",
        "classes": ["car", "pedestrian"],
        "suite": SUITE,
    }
    refused = client_of("engineer").post("/api/v1/detectors/", body, format="json")
    assert refused.status_code == 403 and "only its leads can" in refused.json()["message"]
    other = client_of("rival").post("/api/v1/detectors/", body, format="json")
    assert other.status_code == 404  # another team's id is not a team the caller sees
    lead = client_of("lead")
    bad = lead.post(
        "/api/v1/detectors/", {**body, "suite": {**SUITE, "protocols": []}}, format="json"
    )
    assert bad.status_code == 400 and bad.json()["errors"][0]["path"].startswith("protocols")
    assert not Detector.objects.filter(name="Rear camera").exists()
    created = lead.post("/api/v1/detectors/", body, format="json")
    assert created.status_code == 201, created.json()
    detector = Detector.objects.get(pk=created.json()["id"])
    assert created.json()["protocols"] == ["coco", "voc"] and detector.classes == [
        "car",
        "pedestrian",
    ]
    assert suites.current_suite(detector).score_threshold == 0.4
    _one_audited_suite(detector, users["lead"])
