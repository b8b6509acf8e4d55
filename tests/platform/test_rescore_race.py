"""Re-scoring against itself and against an upload in two connections: both take the
version's row lock (``SELECT … FOR UPDATE``) and re-read the revision's current set
under it, so whatever the order, one set per version and revision exists and the
other side is told why it did nothing. PostgreSQL only (row locks); under CI=true it
must run.
"""

import os
import threading
import time

import pytest
from django.db import connection

from evaluation import services as evaluation_services
from evaluation import tasks
from evaluation.services import UploadConflict
from releases import rescore, services
from releases import tasks as release_tasks
from releases.models import PredictionSet

from .conftest import detections_for, in_process, upload

pytestmark = [pytest.mark.integration, pytest.mark.django_db(transaction=True)]
HOLD = 0.6


@pytest.fixture
def behind(detector, split_truth, users, monkeypatch, flushable):
    """Version 1.4 scored on rev 1, rev 2 frozen (one image fewer)."""
    if connection.vendor != "postgresql":
        if os.environ.get("CI") == "true":
            pytest.fail("CI=true: the race tests need PostgreSQL (DATABASE_URL)")
        pytest.skip("row locks need PostgreSQL; set DATABASE_URL to run")
    monkeypatch.setattr(tasks.score, "delay", in_process(tasks.score))
    monkeypatch.setattr(release_tasks.judge, "delay", lambda *args: None)
    monkeypatch.setattr(release_tasks.rejudge, "delay", lambda *args: None)
    rev1 = evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", split_truth)
    )
    version = services.create_version(detector, "1.4", users["engineer"])
    services.submit_predictions(
        version, rev1, upload("p.json", detections_for(split_truth)), users["engineer"]
    )
    removed = split_truth["images"][0]["id"]
    rev2_truth = dict(split_truth)
    rev2_truth["images"] = split_truth["images"][1:]
    rev2_truth["annotations"] = [a for a in split_truth["annotations"] if a["image_id"] != removed]
    rev2 = evaluation_services.load_split(
        name="bay-night", revision=2, truth=upload("bay-night-2.json", rev2_truth)
    )
    own = [d for d in detections_for(split_truth, seed=9) if d["image_id"] != removed]
    return version, rev2, own


def _thread(target, results, name):
    def run():
        try:
            results[name] = target()
        except Exception as e:  # noqa: BLE001 - the outcome is what the test checks
            results[name] = e
        finally:
            connection.close()

    return threading.Thread(target=run, name=name)


def _slowed(monkeypatch, module, name, locked, waiting):
    original = getattr(module, name)

    def slow(*args, **kwargs):
        locked.set()  # this side holds the version's row lock
        waiting.wait(5)
        time.sleep(HOLD)  # the other side is now blocked on it
        return original(*args, **kwargs)

    monkeypatch.setattr(module, name, slow)


def test_two_re_scores_at_once_make_one_set(behind, detector, users, monkeypatch):
    version, rev2, _ = behind
    locked, waiting = threading.Event(), threading.Event()
    _slowed(monkeypatch, rescore, "_rescore_one", locked, waiting)
    results = {}
    first = _thread(lambda: rescore.rescore(detector, users["lead"], rev2), results, "first")
    first.start()
    assert locked.wait(5)
    monkeypatch.undo()  # the second runs unslowed (the first already holds its copy)
    monkeypatch.setattr(tasks.score, "delay", in_process(tasks.score))
    monkeypatch.setattr(release_tasks.judge, "delay", lambda *args: None)
    monkeypatch.setattr(release_tasks.rejudge, "delay", lambda *args: None)
    second = _thread(lambda: rescore.rescore(detector, users["lead"], rev2), results, "second")
    second.start()
    waiting.set()
    first.join(20)
    second.join(20)
    assert [o.status for o in results["first"].outcomes] == ["rescored"]
    assert [o.status for o in results["second"].outcomes] == ["skipped"]
    assert "already re-scored" in results["second"].outcomes[0].reason
    assert PredictionSet.objects.filter(version=version, split=rev2).count() == 1


def test_an_upload_waiting_for_a_re_score_is_refused_with_the_reason(
    behind, detector, users, monkeypatch
):
    version, rev2, own = behind
    locked, waiting = threading.Event(), threading.Event()
    _slowed(monkeypatch, rescore, "_rescore_one", locked, waiting)
    results = {}
    first = _thread(lambda: rescore.rescore(detector, users["lead"], rev2), results, "rescore")
    first.start()
    assert locked.wait(5)
    second = _thread(
        lambda: services.submit_predictions(
            version, rev2, upload("own.json", own), users["engineer"]
        ),
        results,
        "upload",
    )
    second.start()
    waiting.set()
    first.join(20)
    second.join(20)
    assert [o.status for o in results["rescore"].outcomes] == ["rescored"]
    assert isinstance(results["upload"], UploadConflict), results["upload"]
    assert PredictionSet.objects.get(version=version, split=rev2).rescored


def test_a_re_score_waiting_for_an_upload_leaves_it_alone(behind, detector, users, monkeypatch):
    version, rev2, own = behind
    locked, waiting = threading.Event(), threading.Event()
    _slowed(monkeypatch, services, "_replace_or_refuse", locked, waiting)
    results = {}
    first = _thread(
        lambda: services.submit_predictions(
            version, rev2, upload("own.json", own), users["engineer"]
        ),
        results,
        "upload",
    )
    first.start()
    assert locked.wait(5)
    second = _thread(lambda: rescore.rescore(detector, users["lead"], rev2), results, "rescore")
    second.start()
    waiting.set()
    first.join(20)
    second.join(20)
    assert isinstance(results["upload"], PredictionSet) and not results["upload"].rescored
    outcome = results["rescore"].outcomes[0]
    assert outcome.status == "skipped" and "its own predictions" in outcome.reason
