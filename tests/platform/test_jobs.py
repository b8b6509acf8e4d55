"""The job lifecycle, in-process: every run ends done or failed with a readable cause,
only the current claim stores, the sweep never changes a finished evaluation, stored
content is checked against its recorded SHA-256, failed stores leave no files.

The real-worker versions of these faults (SIGKILL, database outage) are in test_faults.py.
"""

import datetime
import json
import logging
import os
import threading

import pytest
from django.db import OperationalError, connection
from django.utils import timezone

from evaluation import engine, jobs, scoring
from evaluation import services as evaluation_services
from evaluation.models import Evaluation, Scorecard
from evaluation.storage import ContentMismatch
from releases import services
from releases.models import AuditEvent

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


def _queued(version, split, split_truth, users, monkeypatch, name="p.json", seed=6):
    """One coco evaluation, queued, nothing dispatched."""
    monkeypatch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
    prediction_set = services.submit_predictions(
        version, split, upload(name, detections_for(split_truth, seed)), users["engineer"]
    )
    return Evaluation.objects.get(predictions=prediction_set.predictions, protocol="coco")


def _records_files(settings):
    folder = os.path.join(settings.MEDIA_ROOT, "records")
    return sorted(os.listdir(folder)) if os.path.isdir(folder) else []


def test_an_unexpected_error_fails_at_once_with_a_message(
    version, split, split_truth, users, monkeypatch, caplog, django_capture_on_commit_callbacks
):
    """An exception the engine does not expect (here OverflowError, as a loader raises
    for an id past 2^63) fails the evaluation on the first attempt, says what happened,
    and logs the traceback; it is not retried."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)

    def overflow(*args, **kwargs):
        raise OverflowError("Python int too large to convert to C long")

    monkeypatch.setattr(engine, "match", overflow)
    with (
        caplog.at_level(logging.ERROR, logger="evaluation.services"),
        django_capture_on_commit_callbacks(execute=True),
    ):
        evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    evaluation.refresh_from_db()
    assert (evaluation.state, evaluation.attempts) == ("failed", 1)
    assert evaluation.error.startswith(
        "scoring p.json on bay-night rev 1 stopped on an unexpected error "
        "(OverflowError: Python int too large to convert to C long)"
    )
    assert evaluation.lease_expires_at is None
    assert "Traceback" in caplog.text and "OverflowError" in caplog.text
    assert AuditEvent.objects.filter(
        kind=AuditEvent.Kind.EVALUATION_FAILED, subject=f"evaluation:{evaluation.pk}"
    ).exists()
    evaluation_services.run_evaluation(evaluation.pk, claim="d2")  # redelivery: a no-op
    evaluation.refresh_from_db()
    assert (evaluation.state, evaluation.attempts) == ("failed", 1)


def test_a_prediction_id_past_2_63_ends_failed_with_a_message(
    version, split, split_truth, users, run_tasks, settings
):
    """A real file with a detection id >= 2^63 and an image id beyond 2^64 that the
    split lacks (the issue's OverflowError once), too large to be checked in the
    request: the worker reads both ids (any size, as pycocotools) and the evaluation
    ends failed naming the file and the unknown image as written."""
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0
    dets = detections_for(split_truth)
    dets[0]["id"] = 2**63
    dets[1]["image_id"] = 2**64 + 5
    prediction_set = run_tasks(
        services.submit_predictions, version, split, upload("big.json", dets), users["engineer"]
    )
    evaluations = Evaluation.objects.filter(predictions=prediction_set.predictions)
    assert {e.state for e in evaluations} == {"failed"}
    assert all(
        "big.json" in e.error and "image 18446744073709551621 is not in the split" in e.error
        for e in evaluations
    ), [e.error for e in evaluations]


def test_a_database_blip_while_storing_is_retried(
    version, split, split_truth, users, monkeypatch, settings
):
    """OperationalError twice while writing the result: the store is retried with
    back-off, the evaluation ends done once, and only one records file exists."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    monkeypatch.setattr(jobs.time, "sleep", lambda s: None)
    failures = iter([OperationalError("server closed the connection"), OperationalError("x")])
    save = Scorecard.save

    def flaky_save(self, *args, **kwargs):
        error = next(failures, None)
        if error:
            raise error
        return save(self, *args, **kwargs)

    monkeypatch.setattr(Scorecard, "save", flaky_save)
    evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    evaluation.refresh_from_db()
    assert (evaluation.state, evaluation.attempts) == ("done", 1)
    assert Scorecard.objects.filter(evaluation=evaluation).count() == 1
    assert _records_files(settings) == [os.path.basename(evaluation.scorecard.records.name)]


def test_an_outage_longer_than_the_window_is_left_to_the_sweep(
    version, split, split_truth, users, monkeypatch, settings
):
    """Past BENCHBOOK_DB_RETRY_SECONDS the error reaches the task (which ends); the
    evaluation stays running with its lease, no file is left, and once the lease has run
    out the sweep requeues it and it is scored."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    settings.BENCHBOOK_DB_RETRY_SECONDS = 0
    with monkeypatch.context() as patch:
        patch.setattr(Scorecard, "save", lambda *a, **k: (_ for _ in ()).throw(OperationalError()))
        with pytest.raises(OperationalError):
            evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    assert _records_files(settings) == []
    assert Evaluation.objects.get(pk=evaluation.pk).state == "running"
    assert jobs.requeue_stalled() == []  # the lease is still live
    Evaluation.objects.filter(pk=evaluation.pk).update(
        lease_expires_at=timezone.now() - datetime.timedelta(seconds=1)
    )
    assert jobs.requeue_stalled() == [evaluation.pk]
    evaluation.refresh_from_db()
    assert (evaluation.state, evaluation.claimed_by, evaluation.progress) == ("queued", "", 0)
    evaluation_services.run_evaluation(evaluation.pk, claim="d2")
    evaluation.refresh_from_db()
    assert (evaluation.state, evaluation.attempts) == ("done", 2)


def test_a_failed_store_leaves_no_records_file(
    version, split, split_truth, users, monkeypatch, settings
):
    """A non-transient error inside the storing transaction: failed with the message,
    no scorecard and no records file (deleted on rollback)."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    monkeypatch.setattr(
        scoring.ClassScore.objects,
        "bulk_create",
        lambda rows: (_ for _ in ()).throw(ValueError("row refused")),
    )
    evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    evaluation.refresh_from_db()
    assert evaluation.state == "failed" and "ValueError: row refused" in evaluation.error
    assert not Scorecard.objects.filter(evaluation=evaluation).exists()
    assert _records_files(settings) == []


def test_only_the_current_claim_stores(version, split, split_truth, users, monkeypatch, settings):
    """The sweep requeues the evaluation while a slow worker is still matching (its lease
    ran out): the slow worker's result is dropped (no scorecard, no file), the next
    delivery scores it, done exactly once."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    match = engine.match

    def slow_match(*args):
        Evaluation.objects.filter(pk=evaluation.pk).update(
            lease_expires_at=timezone.now() - datetime.timedelta(seconds=1)
        )
        assert jobs.requeue_stalled() == [evaluation.pk]  # as the beat sweep would
        return match(*args)

    with monkeypatch.context() as patch:
        patch.setattr(engine, "match", slow_match)
        evaluation_services.run_evaluation(evaluation.pk, claim="slow")
    evaluation.refresh_from_db()
    assert evaluation.state == "queued" and not Scorecard.objects.filter(evaluation=evaluation)
    assert _records_files(settings) == []
    evaluation_services.run_evaluation(evaluation.pk, claim="next")
    evaluation.refresh_from_db()
    assert (evaluation.state, evaluation.attempts, evaluation.claimed_by) == ("done", 2, "next#2")
    assert Scorecard.objects.filter(evaluation=evaluation).count() == 1
    assert len(_records_files(settings)) == 1


def test_claims(version, split, split_truth, users, monkeypatch, settings):
    """A duplicate delivery is dropped while the lease is live and takes over once it ran
    out; past BENCHBOOK_MAX_ATTEMPTS the evaluation fails with the reason."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    first = jobs.claim(evaluation.pk, "a")
    assert (first.claimed_by, first.state) == ("a#1", "running")
    assert jobs.claim(evaluation.pk, "b") is None
    Evaluation.objects.filter(pk=evaluation.pk).update(lease_expires_at=timezone.now())
    assert jobs.claim(evaluation.pk, "b").claimed_by == "b#2"
    with pytest.raises(jobs.ClaimLost):
        jobs.progress(first, 50)  # the first holder learns it lost the claim
    assert jobs.claim(evaluation.pk, "c") is None  # b's lease is live
    Evaluation.objects.filter(pk=evaluation.pk).update(attempts=settings.BENCHBOOK_MAX_ATTEMPTS)
    Evaluation.objects.filter(pk=evaluation.pk).update(lease_expires_at=timezone.now())
    assert jobs.claim(evaluation.pk, "c") is None
    evaluation.refresh_from_db()
    assert evaluation.state == "failed" and evaluation.error.startswith(
        "gave up after 3 attempts that did not finish"
    )


def test_the_sweep_leaves_finished_and_live_evaluations_alone(
    version, split, split_truth, users, monkeypatch, settings
):
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    settings.BENCHBOOK_QUEUED_GRACE_SECONDS = 0
    settings.BENCHBOOK_LEASE_SECONDS = 0
    done_before = Evaluation.objects.filter(state="done").values().get(pk=evaluation.pk)
    # A done row with an old lease or started_at (e.g. edited by hand) is still done.
    Evaluation.objects.filter(pk=evaluation.pk).update(
        lease_expires_at=timezone.now() - datetime.timedelta(hours=1)
    )
    jobs.requeue_stalled()
    after = Evaluation.objects.values().get(pk=evaluation.pk)
    assert (after["state"], after["finished_at"]) == ("done", done_before["finished_at"])


@pytest.mark.django_db(transaction=True)
def test_sweep_and_finish_interleaved_on_two_connections(
    version, split, split_truth, users, monkeypatch, settings, flushable
):
    """Forced order: a worker (thread, own connection) has locked the row to store its
    result when the sweep (another connection) sees its lease expired. The sweep skips
    (PostgreSQL: SKIP LOCKED) or waits (SQLite: one writer) and then re-checks: the
    evaluation ends done, once, and the sweep requeues nothing."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    storing, release = threading.Event(), threading.Event()
    class_rows = scoring.class_rows

    def paused_rows(*args):
        # Inside the storing transaction, the row locked: make the lease look expired.
        Evaluation.objects.filter(pk=evaluation.pk).update(
            lease_expires_at=timezone.now() - datetime.timedelta(seconds=1)
        )
        storing.set()
        assert release.wait(30)
        return class_rows(*args)

    monkeypatch.setattr(scoring, "class_rows", paused_rows)
    outcome = {}

    def worker():
        try:
            evaluation_services.run_evaluation(evaluation.pk, claim="w")
        finally:
            connection.close()

    def sweeper():
        try:
            outcome["requeued"] = jobs.requeue_stalled()
        finally:
            connection.close()

    w = threading.Thread(target=worker)
    w.start()
    assert storing.wait(30)
    s = threading.Thread(target=sweeper)
    s.start()
    s.join(0.5 if connection.vendor == "sqlite" else 10)
    release.set()
    w.join(30)
    s.join(30)
    evaluation.refresh_from_db()
    assert outcome["requeued"] == [] and evaluation.state == "done"
    assert Scorecard.objects.filter(evaluation=evaluation).count() == 1
    assert jobs.requeue_stalled() == []
    assert Evaluation.objects.get(pk=evaluation.pk).state == "done"


@pytest.mark.django_db(transaction=True)
def test_the_lease_is_renewed_while_scoring(
    version, split, split_truth, users, monkeypatch, settings, flushable
):
    """Matching outlasts the lease: the holder's thread renews it, so the sweep does not
    take a busy evaluation away."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    settings.BENCHBOOK_LEASE_SECONDS = 0.6
    match = engine.match
    seen = {}

    def slow_match(*args):
        first = Evaluation.objects.get(pk=evaluation.pk).lease_expires_at
        threading.Event().wait(1.5)
        seen["renewed"] = Evaluation.objects.get(pk=evaluation.pk).lease_expires_at > first
        seen["requeued"] = jobs.requeue_stalled()
        return match(*args)

    monkeypatch.setattr(engine, "match", slow_match)
    evaluation_services.run_evaluation(evaluation.pk, claim="busy")
    evaluation.refresh_from_db()
    assert seen == {"renewed": True, "requeued": []}
    assert (evaluation.state, evaluation.attempts) == ("done", 1)


# Stored content checked against its hash ------------------------------------------


def _half_truth(split_truth):
    changed = dict(split_truth)
    changed["annotations"] = split_truth["annotations"][::2]
    return json.dumps(changed)


def test_a_swapped_truth_file_fails_loudly_even_with_a_cached_copy(
    version, split, split_truth, users, monkeypatch, settings
):
    """Scored once (the parsed split is now in the columnar cache), then the stored
    truth file is replaced with half its annotations: the next evaluation fails with
    "split content does not match its hash" and the audit trail records it."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    assert Evaluation.objects.get(pk=evaluation.pk).state == "done"
    with open(split.truth_file.path, "w") as f:
        f.write(_half_truth(split_truth))
    other = services.create_version(version.detector, "1.5.0", users["engineer"])
    # An upload small enough to be checked in the request is refused there...
    with pytest.raises(
        evaluation_services.UploadError,
        match="bay-night rev 1 cannot be used: split content does not match its hash",
    ):
        _queued(other, split, split_truth, users, monkeypatch, "q.json", seed=9)
    # ...a larger one is left to the worker, whose evaluation fails.
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0
    second = _queued(other, split, split_truth, users, monkeypatch, "q.json", seed=9)
    evaluation_services.run_evaluation(second.pk, claim="d2")
    second.refresh_from_db()
    assert second.state == "failed"
    assert second.error.startswith("split content does not match its hash: bay-night rev 1")
    event = AuditEvent.objects.filter(kind=AuditEvent.Kind.CONTENT_MISMATCH).first()
    assert event.subject == f"split:{split.pk}" and event.payload["expected_sha256"] == split.sha256


def _forge(folder, entry, arrays):
    """Overwrite a cache entry the way someone who knows the scheme but not the
    platform's secret would: new columns, digest recomputed with another key."""
    from evaluation.engine.loaders import cache

    key = entry.removesuffix(".npz")
    arrays = {k: v for k, v in arrays.items() if k != "__digest__"}
    arrays["__digest__"] = cache.np.array(cache.entry_digest(b"", key, arrays))
    cache.np.savez(os.path.join(folder, entry), **arrays)


def _entries(folder, column):
    """Cache entries (file names) holding ``column`` (``score``: predictions)."""
    found = []
    for name in sorted(os.listdir(folder)):
        if name.endswith(".npz"):
            with engine.loaders.cache.np.load(os.path.join(folder, name)) as data:
                if column in data.files:
                    found.append(name)
    return found


def test_a_tampered_truth_cache_entry_is_rebuilt_and_audited(
    version, split, split_truth, users, monkeypatch, settings
):
    """The parsed-split cache entry is overwritten with another split's columns and a
    digest under another key: the check on load refuses it, the entry is rebuilt from
    the stored (hashed) truth file, the split's own content is served, and the rebuild
    is an audit event."""
    evaluation_services.load_truth_of(split)  # fills the cache
    folder = settings.BENCHBOOK_ENGINE_CACHE
    (entry,) = [name for name in os.listdir(folder) if name.endswith(".npz")]
    with open(os.path.join(folder, "other.json"), "w") as f:
        f.write(_half_truth(split_truth))
    other = engine.load_truth(os.path.join(folder, "other.json"))
    _forge(folder, entry, engine.loaders.cache._to_arrays(other))
    truth = evaluation_services.load_truth_of(split)
    assert truth.content_hash() == split.sha256 and truth.n_boxes == split.box_count
    event = AuditEvent.objects.get(kind=AuditEvent.Kind.CONTENT_MISMATCH)
    assert event.subject == "cache:" + entry.removesuffix(".npz")
    assert "does not match its digest" in event.payload["message"]
    assert evaluation_services.load_truth_of(split).n_boxes == split.box_count  # rebuilt
    assert AuditEvent.objects.filter(kind=AuditEvent.Kind.CONTENT_MISMATCH).count() == 1


def test_a_tampered_predictions_cache_entry_is_rebuilt(
    version, split, split_truth, users, monkeypatch, settings
):
    """The parsed-predictions entry (filled by the upload's check) gets reversed scores
    and a forged digest: the worker rebuilds it from the stored file and scores what
    was uploaded — the same AP as the engine on the file with no cache — and the
    rebuild is an audit event."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    folder = settings.BENCHBOOK_ENGINE_CACHE
    (entry,) = _entries(folder, "score")
    with engine.loaders.cache.np.load(os.path.join(folder, entry)) as data:
        arrays = {name: data[name] for name in data.files}
    arrays["score"] = 1.0 - arrays["score"]
    _forge(folder, entry, arrays)
    evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    evaluation.refresh_from_db()
    assert evaluation.state == "done"
    truth = engine.load_truth(split.truth_file.path)
    expected = engine.evaluate(
        truth, engine.load_predictions(evaluation.predictions.file.path, truth), "coco"
    )
    assert Scorecard.objects.get(evaluation=evaluation).summary == expected["summary"]
    assert AuditEvent.objects.filter(
        kind=AuditEvent.Kind.CONTENT_MISMATCH, subject="cache:" + entry.removesuffix(".npz")
    ).exists()


def test_a_swapped_predictions_file_fails_loudly(version, split, split_truth, users, monkeypatch):
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    path = evaluation.predictions.file.path
    with open(path, "w") as f:
        json.dump(detections_for(split_truth, seed=11), f)
    evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    evaluation.refresh_from_db()
    assert evaluation.state == "failed"
    assert evaluation.error.startswith("predictions file does not match its hash: p.json")
    assert AuditEvent.objects.filter(
        kind=AuditEvent.Kind.CONTENT_MISMATCH, subject=f"predictions:{evaluation.predictions_id}"
    ).exists()


def test_records_files_are_checked_when_read(version, split, split_truth, users, monkeypatch):
    """The scorecard keeps its records file's SHA-256; judging and bootstrap read them
    through load_records, which refuses a changed file."""
    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    card = Scorecard.objects.get(evaluation=evaluation)
    records = evaluation_services.load_records(card)
    assert records.n_images == split.image_count and len(card.records_sha256) == 64
    with open(card.records.path, "ab") as f:
        f.write(b"\0")
    with pytest.raises(ContentMismatch, match="records file does not match"):
        evaluation_services.load_records(card)
    assert AuditEvent.objects.filter(
        kind=AuditEvent.Kind.CONTENT_MISMATCH, subject=f"scorecard:{card.pk}"
    ).exists()


class Killed(BaseException):
    """The worker process dying at this point (not an error anything catches)."""


def test_a_crash_right_after_the_commit_leaves_a_chained_result(
    version, split, split_truth, users, monkeypatch, django_capture_on_commit_callbacks
):
    """The evaluation-finished event (with the result's digests) is written in the
    same transaction as the result, so a worker killed just after the commit — before
    any after-commit work — leaves a result that verify_audit finds in the chain."""
    from evaluation import signals
    from releases import audit_check

    evaluation = _queued(version, split, split_truth, users, monkeypatch)

    def killed(*args, **kwargs):
        raise Killed

    monkeypatch.setattr(signals.evaluation_finished, "send", killed)
    with pytest.raises(Killed), django_capture_on_commit_callbacks(execute=True):
        evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    evaluation.refresh_from_db()
    assert evaluation.state == "done"
    report = audit_check.check()
    assert report.ok, report.problems
    assert AuditEvent.objects.filter(
        kind=AuditEvent.Kind.EVALUATION_FINISHED, subject=f"evaluation:{evaluation.pk}"
    ).exists()


def test_a_crash_while_chaining_the_result_stores_nothing(
    version, split, split_truth, users, monkeypatch, settings
):
    """Killed while its event is being written, the result is not stored either (no
    scorecard, no records file, still running for the sweep); the redelivered message
    stores both, and verify_audit finds nothing wrong at either point."""
    from releases import audit, audit_check

    evaluation = _queued(version, split, split_truth, users, monkeypatch)
    record_event = audit.record_event
    calls = []

    def dies_once(kind, *args, **kwargs):
        if kind == AuditEvent.Kind.EVALUATION_FINISHED and not calls:
            calls.append(kind)
            raise Killed
        return record_event(kind, *args, **kwargs)

    monkeypatch.setattr(audit, "record_event", dies_once)
    with pytest.raises(Killed):
        evaluation_services.run_evaluation(evaluation.pk, claim="d1")
    evaluation.refresh_from_db()
    assert evaluation.state == "running" and not Scorecard.objects.exists()
    assert _records_files(settings) == [] and calls
    assert audit_check.check().ok
    evaluation_services.run_evaluation(evaluation.pk, claim="d1")  # the redelivery
    evaluation.refresh_from_db()
    assert evaluation.state == "done" and Scorecard.objects.count() == 1
    report = audit_check.check()
    assert report.ok and report.results_checked == 1, report.problems
