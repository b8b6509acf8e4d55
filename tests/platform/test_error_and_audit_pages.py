"""403 and 404 pages keep the navigation and say why; the audit trail page lists the
events a reader may see, filtered, with the chain's verification status."""

import json
import os

import pytest
from django.db import connection
from django.utils.html import escape

from releases import criteria, services
from releases import triggers as audit_triggers
from releases.models import AuditEvent

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db

NAV = ('href="/"', 'href="/splits/"', 'href="/audit/"')


def _has_nav(html):
    return all(link in html for link in NAV) and "Sign out" in html


def test_403_names_the_role_that_may(client, detector, users):
    client.force_login(users["reviewer"])
    response = client.get(f"/detectors/{detector.pk}/upload/")
    html = response.content.decode()
    assert response.status_code == 403 and _has_nav(html)
    assert "only engineers and leads of Shuttle Perception can" in html
    client.force_login(users["engineer"])
    response = client.post(f"/detectors/{detector.pk}/criteria/", {"rules": "[]"})
    assert response.status_code == 403 and "leads only" in response.content.decode()
    assert _has_nav(response.content.decode())


def test_404_keeps_the_navigation_and_does_not_leak(client, detector, users):
    client.force_login(users["rival"])
    response = client.get(f"/detectors/{detector.pk}/")
    html = response.content.decode()
    assert response.status_code == 404 and _has_nav(html)
    assert "no such detector" in html and "a team you are not a member of" in html
    assert "Forward camera" not in html
    missing = client.get("/nowhere/at/all/")
    assert missing.status_code == 404 and "no such page" in missing.content.decode()
    assert _has_nav(missing.content.decode())
    api = client.get("/api/v1/nowhere/")  # the API keeps its JSON body
    assert api.status_code == 404 and api.json()["code"] == "not_found"


@pytest.fixture
def trail(detector, version, split, split_truth, users, run_tasks, rival_detector):
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    other = services.create_version(detector, "1.5.0", users["engineer"])
    run_tasks(
        services.submit_predictions,
        other,
        split,
        upload("q.json", detections_for(split_truth, seed=9)),
        users["engineer"],
    )
    criteria.set_criteria(detector, users["lead"], [{"kind": "min_value", "threshold": 0.1}])
    criteria.set_criteria(
        detector,
        users["lead"],
        [{"kind": "min_value", "threshold": 0.1}, {"kind": "max_drop", "tolerance": 2}],
    )
    rival_version = services.create_version(rival_detector, "7.0", users["rival"])
    run_tasks(
        services.submit_predictions,
        rival_version,
        split,
        upload("r.json", detections_for(split_truth, seed=11)),
        users["rival"],
    )
    return version, other


def _rows(response):
    return [entry["event"] for entry in response.context["trail"]["events"]]


def test_audit_page_filters_and_links(client, detector, trail, users):
    version, other = trail
    client.force_login(users["reviewer"])
    everything = client.get("/audit/")
    html = everything.content.decode()
    assert everything.status_code == 200 and "not run yet" in html
    assert _rows(everything) == list(AuditEvent.objects.order_by("-id"))  # reviewers read all
    assert f'href="/versions/{version.pk}/"' in html and 'href="/criteria/' not in html
    assert f'href="/detectors/{detector.pk}/criteria/"' in html  # a criteria change links there

    only = client.get(f"/audit/?version={version.pk}")
    subjects = {e.subject for e in _rows(only)}
    sets = {f"prediction-set:{ps.pk}" for ps in version.prediction_sets.all()}
    assert sets <= subjects and f"prediction-set:{other.prediction_sets.get().pk}" not in subjects
    # Each judging of the version is an event about it too (issue 10).
    assert {e.kind for e in _rows(only)} == {
        "predictions uploaded",
        "evaluation finished",
        "judged",
    }

    changes = client.get(f"/audit/?detector={detector.pk}&kind=criteria+changed&actor=lead")
    assert [e.payload["number"] for e in _rows(changes)] == [2, 1]
    assert client.get("/audit/?actor=nobody").context["trail"]["events"] == []
    assert _rows(client.get("/audit/?until=2000-01-01")) == []
    assert len(_rows(client.get("/audit/?since=2000-01-01"))) == AuditEvent.objects.count()

    bad = client.get("/audit/?since=yesterday&kind=deleted")
    text = bad.content.decode()
    assert bad.status_code == 400 and "since: not a date (YYYY-MM-DD)" in text
    assert "kind: must be one of" in text


def test_members_see_only_their_teams_events(client, detector, trail, users):
    client.force_login(users["rival"])
    response = client.get("/audit/")
    subjects = {e.subject for e in _rows(response)}
    version, other = trail
    assert f"version:{version.pk}" not in subjects
    assert not any(
        s == f"prediction-set:{ps.pk}" for ps in version.prediction_sets.all() for s in subjects
    )
    assert any(e.actor == "rival" for e in _rows(response))
    # Another team's detector as a filter is refused like an unknown one.
    refused = client.get(f"/audit/?detector={detector.pk}")
    assert refused.status_code == 400 and "detector: no such detector" in refused.content.decode()


def test_audit_page_shows_a_broken_chain(client, trail, users):
    """Someone with the database owner's rights switches the trigger off and edits."""
    first = AuditEvent.objects.order_by("id").first()
    audit_triggers.remove(connection)
    with connection.cursor() as cursor:
        cursor.execute("UPDATE releases_auditevent SET actor = 'mallory' WHERE id = %s", [first.pk])
    audit_triggers.install(connection)
    client.force_login(users["reviewer"])
    html = client.get("/audit/").content.decode()
    assert "not run yet" in html  # the page itself only reads the last verification
    html = client.post("/audit/verify/", follow=True).content.decode()
    assert "finding" in html and f"broken at event #{first.pk}" in html


def test_the_audit_page_shows_the_full_verification(client, trail, users, settings, tmp_path):
    """The page shows the last full verification (the function verify_audit runs):
    what it checked and when. A score edited by the owner leaves the chain intact —
    the old chain-only check said "verified" — but the result no longer matches its
    digest, and the page says so. Findings are for reviewers, who alone run it."""
    from evaluation.models import ClassScore, Evaluation
    from releases.models import Judgement

    from .conftest import triggers_off

    client.force_login(users["reviewer"])
    html = client.post("/audit/verify/", follow=True).content.decode()
    count = AuditEvent.objects.count()
    assert "no findings" in html and f"{count} events re-hashed" in html
    assert "by reviewer" in html and "No head file checked" in html
    finished = Evaluation.objects.filter(state__in=["done", "failed"]).count()
    assert f"{finished} finished evaluations re-derived from their rows" in html
    assert f"{Judgement.objects.count()} judgements (verdict, reasons, outcome values)" in html
    with triggers_off():
        ClassScore.objects.filter(class_name="pedestrian").update(ap=0.999)
    assert "no findings" in client.get("/audit/").content.decode()  # as of the last run
    html = client.post("/audit/verify/", follow=True).content.decode()
    assert 'id="verification-findings"' in html and "no longer matches its digest (classes)" in html

    head = tmp_path / "head.log"
    head.write_text(
        "".join(f"{pk} {h}\n" for pk, h in AuditEvent.objects.values_list("pk", "hash"))
    )
    settings.BENCHBOOK_AUDIT_HEAD_FILE = str(head)
    html = client.post("/audit/verify/", follow=True).content.decode()
    assert f"Head file <code>{head}</code>" in html

    client.force_login(users["engineer"])  # a member: no details, no button
    html = client.get("/audit/").content.decode()
    assert "a reviewer can read them here" in html and "(classes)" not in html
    assert 'id="verify-now"' not in html
    assert client.post("/audit/verify/").status_code == 403


def test_the_command_keeps_its_verification_for_the_page(client, trail, users):
    from django.core.management import call_command

    call_command("verify_audit", stdout=open(os.devnull, "w"))
    client.force_login(users["engineer"])
    html = client.get("/audit/").content.decode()
    assert "by verify_audit command" in html and "no findings" in html


def test_criteria_history_shows_each_version_and_its_diff(client, detector, trail, users):
    client.force_login(users["engineer"])
    html = client.get(f"/detectors/{detector.pk}/criteria/").content.decode()
    assert html.count('id="history"') == 1 and html.count("Save as a new version") == 0
    assert 'id="criteria-v2"' in html and 'id="criteria-v1"' in html
    added = escape(json.dumps({"kind": "max_drop"})[1:-1])  # "kind": "max_drop"
    assert f'<span class="diff-added">+    {added},</span>' in html
    assert 'class="diff-removed"' not in html  # v2 only added a rule
    assert "The first version." in html
