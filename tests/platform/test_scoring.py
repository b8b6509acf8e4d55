"""Upload -> queued -> scored: numbers equal the engine's own, tasks are idempotent."""

import datetime

import pytest
from django.utils import timezone

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import ClassScore, Evaluation, Scorecard, SliceScore
from evaluation.storage import local_path
from releases import services

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


def test_upload_is_scored_and_equals_the_engine(
    version, split, split_truth, users, run_tasks, tmp_path
):
    dets = detections_for(split_truth)
    prediction_set = run_tasks(
        services.submit_predictions, version, split, upload("preds.json", dets), users["engineer"]
    )
    evaluations = Evaluation.objects.filter(predictions=prediction_set.predictions).order_by(
        "protocol"
    )
    assert [e.protocol for e in evaluations] == ["coco", "voc"]
    assert all(e.state == "done" and e.progress == 100 and e.attempts == 1 for e in evaluations)

    # The same files scored by the engine directly (outside Django) give the same numbers.
    (tmp_path / "gt.json").write_text(__import__("json").dumps(split_truth))
    (tmp_path / "dt.json").write_text(__import__("json").dumps(dets))
    truth = engine.load_truth(tmp_path / "gt.json")
    direct = engine.evaluate(truth, engine.load_predictions(tmp_path / "dt.json", truth), "coco")
    card = Scorecard.objects.get(
        evaluation__protocol="coco", evaluation__predictions=prediction_set.predictions
    )
    assert card.summary == direct["summary"]
    assert card.split_sha256 == split.sha256 == truth.content_hash()
    assert card.predictions_sha256 == prediction_set.predictions.sha256
    assert card.engine_version == engine.ENGINE_VERSION
    rows = {r.class_name: r for r in ClassScore.objects.filter(scorecard=card)}
    assert set(rows) == {"", "car", "pedestrian", "cyclist"}  # '' = the mean row
    assert rows[""].ap == direct["summary"]["AP"] and rows[""].recall == direct["summary"]["AR100"]
    assert rows["pedestrian"].ap == direct["per_class"]["pedestrian"]["AP"]
    assert rows["pedestrian"].ap50 == direct["per_class"]["pedestrian"]["AP50"]
    assert SliceScore.objects.filter(
        scorecard=card, kind="size", name="small", class_name=""
    ).exists()
    assert prediction_set.predictions.__class__.objects.get().record_count == len(dets)

    # The stored match records re-score to the same numbers.
    with local_path(card.records) as path:
        again = engine.score_records(engine.MatchRecords.load(path), "coco")
    assert again["summary"] == card.summary


def test_scoring_again_is_a_no_op(version, split, split_truth, users, run_tasks):
    prediction_set = run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("preds.json", detections_for(split_truth)),
        users["engineer"],
    )
    evaluation = Evaluation.objects.filter(predictions=prediction_set.predictions).first()
    finished_at = evaluation.finished_at
    evaluation_services.run_evaluation(evaluation.pk, claim="another-delivery")
    evaluation.refresh_from_db()
    assert (evaluation.attempts, evaluation.finished_at) == (1, finished_at)
    assert Scorecard.objects.filter(evaluation=evaluation).count() == 1


def test_a_crashed_run_restarts_on_redelivery(version, split, split_truth, users, monkeypatch):
    monkeypatch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
    prediction_set = services.submit_predictions(
        version, split, upload("p.json", detections_for(split_truth)), users["engineer"]
    )
    evaluation = Evaluation.objects.filter(predictions=prediction_set.predictions).first()
    # A worker took it and died: state running, claimed by its delivery, lease still live.
    Evaluation.objects.filter(pk=evaluation.pk).update(
        state="running",
        attempts=1,
        started_at=timezone.now(),
        claimed_by="delivery-1#1",
        lease_expires_at=timezone.now() + datetime.timedelta(minutes=1),
    )
    # A duplicate message (another delivery) while it looks alive is dropped...
    evaluation_services.run_evaluation(evaluation.pk, claim="delivery-2")
    assert Evaluation.objects.get(pk=evaluation.pk).state == "running"
    # ...the redelivery of the same message restarts it cleanly.
    evaluation_services.run_evaluation(evaluation.pk, claim="delivery-1")
    evaluation.refresh_from_db()
    assert (evaluation.state, evaluation.attempts) == ("done", 2)
    assert Scorecard.objects.filter(evaluation=evaluation).count() == 1


def test_attempts_are_capped(version, split, split_truth, users, monkeypatch, settings):
    monkeypatch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
    prediction_set = services.submit_predictions(
        version, split, upload("p.json", detections_for(split_truth)), users["engineer"]
    )
    evaluation = Evaluation.objects.filter(predictions=prediction_set.predictions).first()
    Evaluation.objects.filter(pk=evaluation.pk).update(attempts=settings.BENCHBOOK_MAX_ATTEMPTS)
    evaluation_services.run_evaluation(evaluation.pk, claim="x")
    evaluation.refresh_from_db()
    assert evaluation.state == "failed" and "gave up after 3 attempts" in evaluation.error


def test_sweep_requeues_what_the_broker_lost(
    version, split, split_truth, users, monkeypatch, run_tasks
):
    def broker_down(*args):
        raise ConnectionError("broker unreachable")

    from evaluation import tasks

    monkeypatch.setattr(tasks.score, "delay", broker_down)
    with_broker_down = run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    stuck = Evaluation.objects.filter(predictions=with_broker_down.predictions)
    assert {e.state for e in stuck} == {"queued"}  # the upload itself succeeded

    sent = []
    monkeypatch.setattr(tasks.score, "delay", lambda pk: sent.append(pk))
    assert run_tasks(evaluation_services.requeue_stalled) == []  # still within the grace period
    stuck.update(queued_at=timezone.now() - datetime.timedelta(hours=1))
    requeued = run_tasks(evaluation_services.requeue_stalled)
    assert sorted(requeued) == sorted(sent) == sorted(e.pk for e in stuck)


def test_a_stalled_running_evaluation_is_requeued(
    version, split, split_truth, users, monkeypatch, run_tasks
):
    with monkeypatch.context() as patch:
        patch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
        prediction_set = services.submit_predictions(
            version, split, upload("p.json", detections_for(split_truth)), users["engineer"]
        )
    evaluation = Evaluation.objects.filter(predictions=prediction_set.predictions).first()
    Evaluation.objects.filter(pk=evaluation.pk).update(
        state="running",
        started_at=timezone.now() - datetime.timedelta(minutes=5),
        lease_expires_at=timezone.now() - datetime.timedelta(seconds=1),
        claimed_by="dead#1",
    )
    run_tasks(evaluation_services.requeue_stalled)
    evaluation.refresh_from_db()
    assert evaluation.state == "done"
