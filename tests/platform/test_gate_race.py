"""The race of issue 10: a lead's sign-off in one connection while the judge commits in
another. Whatever the interleaving, the sign-off either sees the new outcomes or is
refused; it is never a plain approval of a failing candidate.

Both sides take the version's row lock (``SELECT … FOR UPDATE``); the interleavings
are forced with events and a pause while one side holds the lock. Row locks need
PostgreSQL (SQLite serialises whole transactions and has no FOR UPDATE): on SQLite
the test skips, except under CI=true, where it must run.
"""

import os
import threading
import time

import pytest
from django.db import connection

from evaluation import services as evaluation_services
from evaluation import tasks
from releases import criteria, services, verdicts
from releases import judging as gate_judging
from releases import tasks as release_tasks
from releases.models import Judgement, SignOff

from .conftest import detections_for, in_process, upload

pytestmark = [pytest.mark.integration, pytest.mark.django_db(transaction=True)]
HOLD = 0.6  # seconds one side keeps the lock while the other is waiting for it
IMPOSSIBLE = {"kind": "min_value", "metric": "AP", "class": "mean", "split": "*", "threshold": 1.0}


@pytest.fixture
def judging(detector, split_truth, users, monkeypatch, flushable):
    """A candidate scored (in-process) whose judging has not run: state ``judging``, and
    the criteria it will fail."""
    if connection.vendor != "postgresql":
        if os.environ.get("CI") == "true":
            pytest.fail("CI=true: the race tests need PostgreSQL (DATABASE_URL)")
        pytest.skip("row locks need PostgreSQL; set DATABASE_URL to run")
    split = evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", split_truth)
    )
    criteria.set_criteria(detector, users["lead"], [IMPOSSIBLE])
    monkeypatch.setattr(tasks.score, "delay", in_process(tasks.score))
    monkeypatch.setattr(release_tasks.judge, "delay", lambda *args: None)  # the judge is late
    monkeypatch.setattr(release_tasks.rejudge, "delay", lambda *args: None)
    version = services.create_version(detector, "1.5", users["engineer"])
    services.submit_predictions(
        version, split, upload("p.json", detections_for(split_truth)), users["engineer"]
    )
    assert verdicts.verdict_of(version).state == "judging"
    return version


def _thread(target, results, name):
    def run():
        try:
            results[name] = target()
        except Exception as e:  # noqa: BLE001 - the outcome is what the test checks
            results[name] = e
        finally:
            connection.close()

    return threading.Thread(target=run, name=name)


def test_a_sign_off_waiting_for_the_judges_lock_sees_its_outcomes(judging, users, monkeypatch):
    """The judge holds the lock first: the sign-off waits, then reads the regression and
    refuses a plain approval."""
    locked, waiting = threading.Event(), threading.Event()
    record = gate_judging._record

    def slow_record(*args, **kwargs):
        locked.set()  # the judge holds the version's row lock
        waiting.wait(5)
        time.sleep(HOLD)  # the sign-off is now blocked on that lock
        return record(*args, **kwargs)

    monkeypatch.setattr(gate_judging, "_record", slow_record)
    results = {}

    def sign():
        locked.wait(5)
        waiting.set()
        started = time.monotonic()
        try:
            return services.sign_off(judging, users["lead"], "approved", "ship it")
        finally:
            results["waited"] = time.monotonic() - started

    threads = [
        _thread(lambda: gate_judging.judge(judging.pk), results, "judge"),
        _thread(sign, results, "sign"),
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join(30)
    assert isinstance(results["judge"], Judgement) and results["judge"].verdict == "regression"
    assert isinstance(results["sign"], services.DecisionError), results["sign"]
    assert "is regression" in str(results["sign"]) and "needs a written justification" in str(
        results["sign"]
    )
    assert results["waited"] >= HOLD * 0.8  # it really waited for the judge's lock
    assert SignOff.objects.count() == 0


def test_a_sign_off_holding_the_lock_first_is_refused_and_the_judge_waits(
    judging, users, monkeypatch
):
    """The sign-off holds the lock first: it reads ``judging`` and is refused; the judge
    records its judgement after, on the inputs it re-reads under the lock."""
    read, judge_started = threading.Event(), threading.Event()
    verdict_of = verdicts.verdict_of

    def slow_verdict(version):
        found = verdict_of(version)
        if threading.current_thread().name == "sign":
            read.set()  # the sign-off holds the row lock and has read the verdict
            judge_started.wait(5)
            time.sleep(HOLD)  # the judge is now blocked on that lock
        return found

    monkeypatch.setattr(verdicts, "verdict_of", slow_verdict)
    results = {}

    def judge():
        read.wait(5)
        judge_started.set()
        return gate_judging.judge(judging.pk)

    threads = [
        _thread(
            lambda: services.sign_off(judging, users["lead"], "approved", "ship it"),
            results,
            "sign",
        ),
        _thread(judge, results, "judge"),
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join(30)
    assert isinstance(results["sign"], services.DecisionError), results["sign"]
    assert "is judging" in str(results["sign"])
    assert isinstance(results["judge"], Judgement) and results["judge"].verdict == "regression"
    assert SignOff.objects.count() == 0
    assert verdicts.verdict_of(judging).state == "regression"
