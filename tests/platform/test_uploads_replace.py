"""Replacing a failed upload (issue 10 item 6): a prediction set whose evaluations
failed can be replaced for the same version and split; the failed set, its file and its
error stay in the history and the audit trail; nothing else can be replaced; at most
one current set per version and split, also under concurrent uploads."""

import pathlib
import threading

import pytest
from django.db import IntegrityError, connection, transaction
from django.urls import reverse
from django.utils import timezone

from evaluation import services as evaluation_services
from evaluation.models import Evaluation, PredictionFile
from evaluation.services import UploadConflict
from releases import audit, selectors, services
from releases.models import AuditEvent, PredictionSet

from .conftest import detections_for, triggers_off, upload
from .test_api import API, client_for, file

pytestmark = pytest.mark.django_db

BAD = '[{"image_id": 999999, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5}]'


@pytest.fixture
def failed_set(version, split, users, run_tasks, settings):
    """Version 1.4.0's predictions on bay-night, accepted (checked by the worker) and
    failed: an image id the split does not have."""
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0
    prediction_set = run_tasks(
        services.submit_predictions, version, split, upload("bad.json", BAD), users["engineer"]
    )
    states = set(
        Evaluation.objects.filter(predictions=prediction_set.predictions).values_list(
            "state", flat=True
        )
    )
    assert states == {"failed"}
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 16 * 1024 * 1024
    return prediction_set


def test_a_failed_set_is_replaced_and_kept_as_history(
    failed_set, version, split, split_truth, users, run_tasks
):
    new = run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("good.json", detections_for(split_truth)),
        users["lead"],
    )
    old = PredictionSet.objects.get(pk=failed_set.pk)
    assert old.replaced_by_id == new.pk and old.replaced_at is not None
    assert list(PredictionSet.objects.current().filter(version=version)) == [new]
    # The failed file and its error stay.
    assert PredictionFile.objects.filter(pk=old.predictions_id).exists()
    assert old.predictions.file.storage.exists(old.predictions.file.name)
    errors = Evaluation.objects.filter(predictions=old.predictions).values_list("error", flat=True)
    assert all("image 999999 is not in the split" in e for e in errors)
    # The version now reads the new set's evaluations only, all scored.
    evaluations = selectors.evaluations_of(version)
    assert {e.predictions_id for e in evaluations} == {new.predictions_id}
    assert {e.state for e in evaluations} == {"done"}
    # The replacement is an audit event naming what it replaced and why it failed.
    event = AuditEvent.objects.get(kind=AuditEvent.Kind.PREDICTIONS_REPLACED)
    assert event.subject == f"prediction-set:{new.pk}" and event.actor == "lead"
    assert event.payload["file"] == "good.json"
    assert event.payload["replaces"]["prediction_set"] == old.pk
    assert event.payload["replaces"]["file"] == "bad.json"
    assert {f["protocol"] for f in event.payload["replaces"]["failed"]} == {"coco", "voc"}
    assert "image 999999" in event.payload["replaces"]["failed"][0]["error"]
    assert audit.verify_audit()[0] is None


def test_a_failed_set_is_replaced_through_the_api_and_the_page(
    failed_set, version, split, split_truth, users, client
):
    """The API answers 201 with the new set; a second attempt on the now queued set is
    409 naming the reason; the page answers the same refusal with 409."""
    api = client_for(users["engineer"])
    good = detections_for(split_truth)
    response = api.post(
        API + "prediction-sets/",
        {
            "detector": version.detector_id,
            "version": version.label,
            "split": split.pk,
            "predictions": file("good.json", good),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    assert response.json()["file_name"] == "good.json"
    again = api.post(
        API + "prediction-sets/",
        {
            "detector": version.detector_id,
            "version": version.label,
            "split": split.pk,
            "predictions": file("other.json", detections_for(split_truth, seed=8)),
        },
        format="multipart",
    )
    body = again.json()
    assert again.status_code == 409 and body["code"] == "conflict", body
    assert "whose evaluations are queued" in body["message"]
    assert "only predictions whose evaluations failed can be replaced" in body["message"]
    client.force_login(users["engineer"])
    page = client.post(
        reverse("upload", args=[version.detector_id]),
        {
            "version": version.label,
            "split": split.pk,
            "predictions": upload("third.json", detections_for(split_truth, seed=9)),
        },
    )
    assert page.status_code == 409
    assert "whose evaluations are queued" in page.content.decode()
    assert PredictionSet.objects.current().filter(version=version).count() == 1
    assert PredictionSet.objects.filter(version=version).count() == 2


@pytest.mark.parametrize("state", ["queued", "running", "done"])
def test_a_set_that_did_not_fail_cannot_be_replaced(
    version, split, split_truth, users, run_tasks, state
):
    prediction_set = run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    if state != "done":  # also: one failed and one still scoring is not replaceable
        evaluations = Evaluation.objects.filter(predictions=prediction_set.predictions)
        with triggers_off():  # planted: a finished evaluation cannot change otherwise
            evaluations.filter(protocol="coco").update(state="failed", error="x")
            evaluations.filter(protocol="voc").update(state=state)
    with pytest.raises(UploadConflict, match=f"whose evaluations are .*{state}"):
        services.submit_predictions(
            version, split, upload("q.json", detections_for(split_truth, seed=7)), users["lead"]
        )
    assert list(PredictionSet.objects.filter(version=version)) == [prediction_set]
    assert not AuditEvent.objects.filter(kind=AuditEvent.Kind.PREDICTIONS_REPLACED).exists()


def test_a_decided_version_keeps_its_failed_set(
    failed_set, version, split, split_truth, users, run_tasks
):
    """A decision was made on what was there: replacing it afterwards would change the
    evidence under the decision."""
    from releases.models import SignOff

    SignOff.objects.create(
        version=version,
        decision="rejected",
        comment="predictions broken",
        evidence={},
        decided_by=users["lead"],
        decided_at=timezone.now(),
    )
    with pytest.raises(UploadConflict, match="a decision was recorded"):
        services.submit_predictions(
            version, split, upload("good.json", detections_for(split_truth)), users["lead"]
        )
    assert PredictionSet.objects.get(version=version).pk == failed_set.pk


def test_the_same_bad_file_again_is_refused_with_its_message(failed_set, version, split, users):
    """Small enough to check inside the request: refused with the engine's message; the
    failed set stays the current one."""
    from evaluation.engine import InputError

    with pytest.raises(InputError, match="bad.json: record 0: field 'image_id': image 999999"):
        services.submit_predictions(version, split, upload("bad.json", BAD), users["lead"])
    assert list(PredictionSet.objects.current().filter(version=version)) == [failed_set]
    assert PredictionSet.objects.filter(version=version).count() == 1


def test_the_database_allows_one_current_set_per_version_and_split(failed_set, users):
    """The partial unique constraint, below every service (raw ORM insert)."""
    with pytest.raises(IntegrityError), transaction.atomic():
        PredictionSet.objects.create(
            version=failed_set.version,
            split=failed_set.split,
            predictions=failed_set.predictions,
            uploaded_by=users["lead"],
            file_name="twin.json",
        )
    PredictionSet.objects.filter(pk=failed_set.pk).update(replaced_at=timezone.now())
    PredictionSet.objects.create(  # a retired set leaves the slot free
        version=failed_set.version,
        split=failed_set.split,
        predictions=failed_set.predictions,
        uploaded_by=users["lead"],
        file_name="twin.json",
    )


@pytest.mark.django_db(transaction=True)
def test_two_concurrent_replacements_cannot_both_win(
    flushable, version, split, split_truth, users, monkeypatch, settings
):
    """Two uploads race to replace the same failed set, each in its own thread and
    database connection, both past the file checks before either writes. The version
    row lock serialises them: one replaces, the other finds the new (queued) set and
    is refused with 409 — never two current sets, never an IntegrityError."""
    from releases import tasks as release_tasks

    monkeypatch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)  # stay queued
    monkeypatch.setattr(release_tasks.judge, "delay", lambda *a: None)
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0
    failed = services.submit_predictions(version, split, upload("bad.json", BAD), users["lead"])
    Evaluation.objects.filter(predictions=failed.predictions).update(state="failed", error="bad")
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 16 * 1024 * 1024

    both_checked = threading.Barrier(2, timeout=30)
    real_received = evaluation_services.received_predictions

    def received(uploaded, split, **options):  # both checked before either transaction
        cm = real_received(uploaded, split, **options)
        value = cm.__enter__()
        both_checked.wait()

        class Held:
            def __enter__(self):
                return value

            def __exit__(self, *exc):
                return cm.__exit__(*exc)

        return Held()

    monkeypatch.setattr(evaluation_services, "received_predictions", received)
    results = {}

    def attempt(name, seed):
        try:
            results[name] = services.submit_predictions(
                version, split, upload(name, detections_for(split_truth, seed=seed)), users["lead"]
            )
        except Exception as e:  # noqa: BLE001 - the test inspects it
            results[name] = e
        finally:
            connection.close()

    threads = [
        threading.Thread(target=attempt, args=(n, s)) for n, s in [("a.json", 1), ("b.json", 2)]
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    won = [r for r in results.values() if isinstance(r, PredictionSet)]
    lost = [r for r in results.values() if not isinstance(r, PredictionSet)]
    assert len(won) == 1 and len(lost) == 1, results
    assert isinstance(lost[0], UploadConflict), repr(lost[0])
    assert "whose evaluations are queued" in str(lost[0])
    assert list(PredictionSet.objects.current().filter(version=version)) == won
    assert PredictionSet.objects.get(pk=failed.pk).replaced_by_id == won[0].pk
    # The loser's bytes are not left in storage.
    loser = ({"a.json", "b.json"} - {won[0].file_name}).pop()
    assert not PredictionFile.objects.filter(original_name=loser).exists()
    assert not list(pathlib.Path(settings.MEDIA_ROOT).rglob(loser))


def test_the_version_page_lists_the_replaced_upload_with_its_error(
    failed_set, version, split, split_truth, users, run_tasks, client
):
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("good.json", detections_for(split_truth)),
        users["lead"],
    )
    client.force_login(users["reviewer"])
    page = client.get(reverse("version", args=[version.pk])).content.decode()
    history = page[page.index('id="replaced-sets"') :]
    assert "bad.json" in history and "by good.json" in history
    assert "image 999999 is not in the split" in history
    # The evaluations table above lists only the current set's evaluations (done).
    table = page[page.index("<h2>Evaluations</h2>") : page.index('id="replaced"')]
    assert "state-failed" not in table and table.count("state-done") == 2
