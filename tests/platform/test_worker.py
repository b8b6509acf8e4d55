"""A real Celery worker process scores an upload through the configured broker.

Under CI=true this runs on PostgreSQL + Redis and must not skip; on the embedded
default it runs on SQLite + the filesystem broker.
"""

import json
import os
import subprocess
import sys
import time
import uuid

import pytest
from django.conf import settings
from django.db import connection

from benchbook.celery import app as celery_app
from evaluation import engine
from evaluation.models import Evaluation, Scorecard
from releases import services

from .conftest import detections_for, upload

pytestmark = [pytest.mark.integration, pytest.mark.django_db(transaction=True)]
ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def _database_url():
    db = connection.settings_dict
    if connection.vendor == "sqlite":
        return f"sqlite:///{db['NAME']}"
    auth = db["USER"] + (f":{db['PASSWORD']}" if db.get("PASSWORD") else "")
    return f"postgres://{auth}@{db['HOST'] or '127.0.0.1'}:{db['PORT'] or 5432}/{db['NAME']}"


@pytest.fixture
def worker(settings, flushable):
    if os.environ.get("CI") == "true":
        # CI must exercise the production stack, never the embedded fallback.
        assert connection.vendor == "postgresql", "CI=true needs DATABASE_URL on PostgreSQL"
        assert settings.CELERY_BROKER_URL.startswith("redis://"), "CI=true needs Redis"
    queue = f"test-{uuid.uuid4().hex[:8]}"
    previous = celery_app.conf.task_default_queue
    celery_app.conf.task_default_queue = queue
    env = {
        **os.environ,
        "DATABASE_URL": _database_url(),
        "CELERY_BROKER_URL": settings.CELERY_BROKER_URL,
        "BENCHBOOK_QUEUE": queue,
        "MEDIA_ROOT": str(settings.MEDIA_ROOT),
        "BENCHBOOK_ENGINE_CACHE": str(settings.BENCHBOOK_ENGINE_CACHE),
    }
    process = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "celery",
            "-A",
            "benchbook",
            "worker",
            "--pool=solo",
            "-Q",
            queue,
            "--without-gossip",
            "--without-mingle",
            "--without-heartbeat",
            "-l",
            "warning",
        ],
        cwd=ROOT,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )
    yield process
    process.terminate()
    try:
        output, _ = process.communicate(timeout=20)
    except subprocess.TimeoutExpired:
        process.kill()
        output, _ = process.communicate()
    celery_app.conf.task_default_queue = previous
    print(output)


def _wait_for(queryset, seconds=90):
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        states = set(queryset.values_list("state", flat=True))
        if states and states <= {"done", "failed"}:
            return states
        time.sleep(0.3)
    raise AssertionError(f"evaluations still {states} after {seconds} s")


def test_real_worker_scores_an_upload(worker, detector, users, split_truth, tmp_path):
    from evaluation import services as evaluation_services

    split = evaluation_services.load_split(
        name="bay-day", revision=1, truth=upload("bay-day.json", split_truth)
    )
    version = services.create_version(detector, "1.0.0", users["engineer"])
    dets = detections_for(split_truth)
    prediction_set = services.submit_predictions(
        version, split, upload("preds.json", dets), users["engineer"]
    )
    evaluations = Evaluation.objects.filter(predictions=prediction_set.predictions)
    assert _wait_for(evaluations) == {"done"}, worker.poll()

    (tmp_path / "gt.json").write_text(json.dumps(split_truth))
    (tmp_path / "dt.json").write_text(json.dumps(dets))
    truth = engine.load_truth(tmp_path / "gt.json")
    predictions = engine.load_predictions(tmp_path / "dt.json", truth)
    for protocol in ("coco", "voc"):
        card = Scorecard.objects.get(evaluation__in=evaluations, protocol=protocol)
        assert card.summary == engine.evaluate(truth, predictions, protocol)["summary"]
    assert settings.CELERY_TASK_ALWAYS_EAGER is False
