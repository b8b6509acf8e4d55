"""Every place that shows a version's state reads the one verdict
(``verdicts.verdict_of`` / ``verdicts.verdicts_of``, the same code): a judgement made
before the criteria changed is stale, so the version reads ``judging`` on the history
chart, the overview, the API's version list and the evidence report, never the old
verdict. The judging sweep reads the same inputs in a fixed number of queries.
"""

import pytest
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.urls import reverse
from rest_framework.test import APIClient

from releases import criteria, judging, judging_queue, selectors, services, verdicts
from releases import tasks as release_tasks

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db
API = "/api/v1/"
IMPOSSIBLE = {"kind": "min_value", "metric": "AP", "class": "mean", "split": "*", "threshold": 1.0}
EASY = {"kind": "min_value", "metric": "AP", "class": "mean", "split": "*", "threshold": 0.0}


@pytest.fixture
def stale(version, split, split_truth, users, run_tasks, monkeypatch):
    """Judged a regression, then the criteria changed and re-judging has not run."""
    criteria.set_criteria(version.detector, users["lead"], [IMPOSSIBLE])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    assert verdicts.newest_judgement(version).verdict == "regression"
    monkeypatch.setattr(release_tasks.rejudge, "delay", lambda *args: None)  # late
    run_tasks(criteria.set_criteria, version.detector, users["lead"], [EASY])
    assert verdicts.verdict_of(version).state == "judging"
    return version


def test_a_stale_judgement_reads_judging_on_every_page_and_the_api(stale, users, client):
    from releases import tokens

    assert selectors.version_badges([stale])[stale.pk] == "judging"
    (row,) = selectors.overview_for(users["lead"])
    assert row["newest_state"] == "judging"
    assert [c["verdict"].state for c in row["candidates"]] == ["judging"]
    from releases import notify

    message = notify.payload(stale)  # a late webhook or e-mail
    assert (message["verdict"], message["failures"], message["regression"]) == (
        "judging",
        [],
        False,
    )
    report = selectors.evidence_for(stale)
    assert report["verdict"]["state"] == "judging"
    assert report["outcomes"] == []  # not the stale judgement's failing rule

    client.force_login(users["lead"])
    page = client.get(reverse("detector", args=[stale.detector_id])).content.decode()
    assert "badge-judging" in page and "badge-regression" not in page
    history = client.get(reverse("detector", args=[stale.detector_id])).context["table"]
    assert [row["state"] for row in history] == ["judging"]
    page = client.get(reverse("overview")).content.decode()
    assert "badge-regression" not in page

    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(users['lead'], 't')[1]}")
    listed = api.get(API + "versions/").json()["results"]
    assert [v["state"] for v in listed] == ["candidate"]  # not "blocked" by the old rules
    assert api.get(f"{API}versions/{stale.pk}/").json()["state"] == "candidate"
    assert api.get(f"{API}versions/{stale.pk}/verdict/").json()["state"] == "judging"
    # The stale judgement's failing rule is no current outcome nor a flag; it stays
    # readable by its id.
    old = verdicts.newest_judgement(stale)
    assert api.get(API + "outcomes/", {"version": stale.pk}).json()["results"] == []
    assert api.get(API + "flags/").json()["results"] == []
    earlier = api.get(API + "outcomes/", {"judgement": old.pk}).json()["results"]
    assert [o["status"] for o in earlier] == ["fail"]

    # Judged against the current criteria, every reader agrees again.
    judging.judge(stale.pk)
    assert selectors.version_badges([stale])[stale.pk] == "pass"
    history = client.get(reverse("detector", args=[stale.detector_id])).context["table"]
    assert [row["state"] for row in history] == ["pass"]
    current = api.get(API + "outcomes/", {"version": stale.pk}).json()["results"]
    assert [o["status"] for o in current] == ["pass"]


def _versions(detector, split, users, count, file_bytes, start=0):
    """``count`` versions uploaded with the same bytes (scored once, reused)."""
    out = []
    for k in range(start, start + count):
        version = services.create_version(detector, f"v{k}", users["engineer"])
        services.submit_predictions(version, split, upload("p.json", file_bytes), users["engineer"])
        out.append(version)
    return out


def test_the_sweep_and_the_badges_take_a_fixed_number_of_queries(
    detector, split, split_truth, users, run_tasks, monkeypatch, settings
):
    """3 versions and 30 versions: the same number of queries (it was about six per
    version), and the sweep still finds every stale one."""
    settings.BENCHBOOK_QUEUED_GRACE_SECONDS = -60  # everything is overdue
    queued = []
    monkeypatch.setattr(release_tasks.judge, "delay", lambda *args: queued.append(args[0]))
    monkeypatch.setattr(release_tasks.rejudge, "delay", lambda *args: None)
    file_bytes = detections_for(split_truth)
    first = run_tasks(_versions, detector, split, users, 3, file_bytes)
    counts = {}
    for size in (3, 30):
        if size == 30:
            first += run_tasks(_versions, detector, split, users, 27, file_bytes, 3)
        queued.clear()
        with CaptureQueriesContext(connection) as sweep:
            found = judging_queue.requeue_unjudged()
        assert sorted(found) == sorted(v.pk for v in first) == sorted(queued)
        versions = list(detector.versions.select_related("sign_off"))
        with CaptureQueriesContext(connection) as badges:
            states = selectors.version_badges(versions)
        assert set(states.values()) == {"judging"}
        counts[size] = (len(sweep.captured_queries), len(badges.captured_queries))
    assert counts[3] == counts[30], counts
    assert counts[30][0] <= 10, counts  # the sweep: the undecided versions + inputs_for
