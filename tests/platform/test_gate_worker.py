"""Re-judging by a real Celery worker process (issue 10): a criteria change and a new
baseline re-judge the undecided candidates; each judgement is an audit event and the
chain verifies. Under CI=true this runs on PostgreSQL + Redis (see test_worker.py)."""

import time

import pytest

from evaluation import services as evaluation_services
from releases import criteria, services, verdicts
from releases.audit import verify_audit
from releases.models import AuditEvent, Judgement

from .conftest import detections_for, upload
from .test_worker import worker  # noqa: F401

pytestmark = [pytest.mark.integration, pytest.mark.django_db(transaction=True)]
IMPOSSIBLE = {"kind": "min_value", "metric": "AP", "class": "mean", "split": "*", "threshold": 1.0}


def _wait(condition, what, seconds=90):
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        found = condition()
        if found:
            return found
        time.sleep(0.3)
    raise AssertionError(f"still not {what} after {seconds} s")


@pytest.mark.usefixtures("worker")
def test_the_worker_rejudges_after_a_criteria_change_and_a_new_baseline(
    detector, split_truth, users
):
    split = evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", split_truth)
    )
    a = services.create_version(detector, "1.0", users["engineer"])
    services.submit_predictions(
        a, split, upload("a.json", detections_for(split_truth)), users["engineer"]
    )
    b = services.create_version(detector, "1.1", users["engineer"])
    services.submit_predictions(
        b, split, upload("b.json", detections_for(split_truth, seed=7)), users["engineer"]
    )
    for version in (a, b):
        _wait(lambda v=version: verdicts.verdict_of(v).state == "pass", "judged pass")

    criteria.set_criteria(detector, users["lead"], [IMPOSSIBLE])  # the worker re-judges both
    for version in (a, b):
        _wait(lambda v=version: verdicts.verdict_of(v).state == "regression", "re-judged")

    services.sign_off(a, users["lead"], "approved", "baseline", justification="field trial")
    judged = _wait(
        lambda: Judgement.objects.filter(version=b, baseline=a).first(), "judged against 1.0"
    )
    assert judged.verdict == "regression" and judged.criteria.number == 1
    assert verdicts.verdict_of(b).judgement == judged
    assert Judgement.objects.filter(version=b).count() == 3  # none replaced
    events = AuditEvent.objects.filter(kind="judged", subject=f"version:{b.pk}").order_by("id")
    assert [e.payload["verdict"] for e in events] == ["pass", "regression", "regression"]
    assert [e.payload["baseline"] for e in events] == [None, None, "1.0"]
    assert verify_audit()[0] is None
