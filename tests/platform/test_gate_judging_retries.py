"""An error while judging is retried with back-off; only when every retry failed is it
recorded, as a final *incomplete* judgement naming the cause. A transient error never
leaves a final verdict, and while retries remain the version reads ``judging`` (so no
decision can be made on it)."""

import pytest

from releases import criteria, judging, judging_queue, services, verdicts
from releases import tasks as release_tasks
from releases.audit import verify_audit
from releases.models import Judgement

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db
EASY = {"kind": "min_value", "metric": "AP", "class": "mean", "split": "*", "threshold": 0.0}


@pytest.fixture
def scored(version, split, split_truth, users, run_tasks, monkeypatch):
    """Scored, judging not run yet (its task is held back)."""
    criteria.set_criteria(version.detector, users["lead"], [EASY])
    monkeypatch.setattr(release_tasks.judge, "delay", lambda *args: None)
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    monkeypatch.undo()
    assert verdicts.verdict_of(version).state == "judging"
    return version


def _failing(monkeypatch, times):
    """``rule_outcomes.outcomes_for`` raises on its first ``times`` calls (a lost database
    connection, a worker out of memory), then works."""
    real = __import__("releases.rule_outcomes", fromlist=["outcomes_for"]).outcomes_for
    calls = []

    def flaky(*args, **kwargs):
        calls.append(1)
        if len(calls) <= times:
            raise ConnectionError("connection to the database server was lost")
        return real(*args, **kwargs)

    monkeypatch.setattr("releases.rule_outcomes.outcomes_for", flaky)
    return calls


def _retries_in_place(monkeypatch):
    """The task's retries run here at once (Celery's eager retry), the countdowns
    recorded instead of waited."""
    countdowns = []
    real_retry = release_tasks.judge.retry

    def retry(*args, **kwargs):
        countdowns.append(kwargs.get("countdown"))
        return real_retry(*args, **kwargs)

    monkeypatch.setattr(release_tasks.judge, "retry", retry)
    # Each eager retry is a new apply(): it must not re-raise the Retry signal.
    monkeypatch.setitem(release_tasks.judge.app.conf, "task_eager_propagates", False)
    return countdowns


def test_an_error_while_retries_remain_records_nothing_and_reads_judging(scored, monkeypatch):
    _failing(monkeypatch, times=1)
    with pytest.raises(judging.JudgingFailed, match="ConnectionError: connection to the"):
        judging.judge(scored.pk, final=False)
    assert not Judgement.objects.exists()
    assert verdicts.verdict_of(scored).state == "judging"


def test_a_transient_error_is_retried_and_leaves_the_real_verdict(scored, monkeypatch, settings):
    settings.BENCHBOOK_JUDGE_RETRY_SECONDS = 10
    calls = _failing(monkeypatch, times=2)
    countdowns = _retries_in_place(monkeypatch)
    release_tasks.judge.apply(args=[scored.pk])
    assert len(calls) == 3 and countdowns == [10, 20]  # back-off doubles
    (judgement,) = Judgement.objects.filter(version=scored)
    assert (judgement.verdict, judgement.reasons) == ("pass", [])
    assert verdicts.verdict_of(scored).state == "pass"
    assert verify_audit()[0] is None


def test_an_error_on_every_retry_is_recorded_as_incomplete_with_its_cause(
    scored, monkeypatch, settings
):
    retries = release_tasks.judge.max_retries
    calls = _failing(monkeypatch, times=100)
    countdowns = _retries_in_place(monkeypatch)
    release_tasks.judge.apply(args=[scored.pk])
    assert len(calls) == retries + 1 and len(countdowns) == retries
    (judgement,) = Judgement.objects.filter(version=scored)
    assert judgement.verdict == "incomplete"
    assert judgement.reasons == [
        f"judging failed after {retries + 1} attempts: "
        "ConnectionError: connection to the database server was lost"
    ]
    verdict = verdicts.verdict_of(scored)
    assert (verdict.state, verdict.final) == ("incomplete", True)
    # Final: the sweep does not queue it again until its inputs change.
    settings.BENCHBOOK_QUEUED_GRACE_SECONDS = -60
    assert scored.pk not in judging_queue.requeue_unjudged()
    assert verify_audit()[0] is None
