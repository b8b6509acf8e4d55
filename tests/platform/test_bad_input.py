"""Bad input on the platform: a clear message, and row counts proving nothing was
half-stored (common practice: refuse atomically, say where the problem is)."""

import json

import pytest
from django.core.exceptions import PermissionDenied
from django.db import DatabaseError, connection, transaction

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import (
    BenchmarkSplit,
    ClassScore,
    Evaluation,
    FrozenError,
    PredictionFile,
    Scorecard,
)
from evaluation.services import UploadConflict, UploadError
from releases import services
from releases.models import ModelVersion, PredictionSet

from .conftest import detections_for, split_dict, upload

pytestmark = pytest.mark.django_db

DET = {"image_id": None, "category_id": 1, "bbox": [10.0, 10.0, 30.0, 40.0], "score": 0.9}


def _counts():
    return {
        "splits": BenchmarkSplit.objects.count(),
        "files": PredictionFile.objects.count(),
        "sets": PredictionSet.objects.count(),
        "evaluations": Evaluation.objects.count(),
        "scorecards": Scorecard.objects.count(),
        "class rows": ClassScore.objects.count(),
        "versions": ModelVersion.objects.count(),
    }


def _first_image(split_truth):
    return split_truth["images"][0]["id"]


@pytest.mark.parametrize(
    "name, content, message",
    [
        (
            "malformed.json",
            '[{"image_id": 1, "category_id": 1 "bbox": [1, 2, 3, 4]}]',
            "malformed.json: not valid JSON: expected ',' or '}' at line 1, column 35",
        ),
        ("truncated.json", lambda ok: json.dumps(ok)[:-30], "truncated.json: the JSON ends early"),
        (
            "split-by-mistake.json",
            lambda ok: json.dumps(split_dict()),
            "split-by-mistake.json: expected a JSON array of detections, got an object",
        ),
        (
            "unknown-image.json",
            lambda ok: json.dumps(ok + [{**ok[0], "image_id": 99999}]),
            "unknown-image.json: record {n}: field 'image_id': image 99999 is not in the split",
        ),
        (
            "nan-image.json",  # a NaN id names nothing: pycocotools' loadRes refuses it
            lambda ok: (
                json.dumps(ok)[:-1]
                + f', {{"image_id": NaN, "category_id": {ok[0]["category_id"]}, '
                + '"bbox": [1, 2, 3, 4], "score": 1e999}]'
            ),
            "nan-image.json: record {n}: field 'image_id': image nan is not in the split",
        ),
        (
            "short-box.json",
            lambda ok: json.dumps(ok + [{**ok[0], "bbox": [5, 5, 3]}]),
            "short-box.json: record {n}: field 'bbox': must be 4 numbers [x, y, w, h], got [5, 5, 3]",
        ),
        (
            "mistyped.json",
            lambda ok: json.dumps(ok + [{**ok[0], "score": "high"}]),
            "mistyped.json: record {n}: field 'score': missing or not a number",
        ),
        (
            "wrong-format.csv",
            lambda ok: "frame,what\n1,car\n",
            "wrong-format.csv: line 1: field 'image_id': missing column(s) image_id",
        ),
    ],
)
def test_invalid_predictions_fail_with_the_engines_message(
    version, split, split_truth, users, run_tasks, name, content, message, settings
):
    """Files over the inline-validation limit are checked by the worker: the evaluation
    fails with the engine's message. (Below the limit the upload itself is refused
    with the same message: test_uploads_validation.py.)"""
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0
    ok = detections_for(split_truth)
    text = content(ok) if callable(content) else content
    prediction_set = run_tasks(
        services.submit_predictions, version, split, upload(name, text), users["engineer"]
    )
    evaluations = Evaluation.objects.filter(predictions=prediction_set.predictions)
    assert {e.state for e in evaluations} == {"failed"}
    for evaluation in evaluations:
        assert evaluation.error.startswith(message.replace("{n}", str(len(ok))))
        assert evaluation.error_detail["file"] == name
    assert Scorecard.objects.count() == 0 and ClassScore.objects.count() == 0


def test_nan_and_infinity_predictions_are_scored_as_pycocotools_reads_them(
    version, split, split_truth, users, run_tasks, settings
):
    """NaN/Infinity literals and 1e999 (Python's json, and so pycocotools, reads them)
    are scored under the default box policy and counted; the stored scorecard holds
    no NaN (PostgreSQL's jsonb would refuse it)."""
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0
    ok = detections_for(split_truth)
    extra = f'{{"image_id": {ok[0]["image_id"]}, "category_id": 1, "bbox": [1, 2, NaN, 4]'
    text = json.dumps(ok)[:-1] + f", {extra}, " + '"score": -Infinity}, '
    text += extra.replace("NaN", "3") + ', "score": 1e999}]'
    prediction_set = run_tasks(
        services.submit_predictions, version, split, upload("odd.json", text), users["engineer"]
    )
    evaluations = Evaluation.objects.filter(predictions=prediction_set.predictions)
    assert {e.state for e in evaluations} == {"done"}, [e.error for e in evaluations]
    cards = Scorecard.objects.filter(evaluation__in=evaluations)
    assert cards.count() == evaluations.count() >= 1
    for card in cards:
        counts = card.result["counts"]["boxes"]["predictions"]
        assert counts["non_finite"] == 1 and counts["non_finite_score"] == 2


@pytest.mark.parametrize(
    "attempt, error, message",
    [
        (
            lambda f: services.submit_predictions(
                f["version"], f["split"], upload("empty.json", b""), f["users"]["engineer"]
            ),
            UploadError,
            "empty.json: the file is empty",
        ),
        (
            lambda f: services.submit_predictions(
                f["version"],
                f["split"],
                upload("p.json", detections_for(f["truth"])),
                f["users"]["rival"],
            ),
            PermissionDenied,
            "rival may not upload for Forward camera",
        ),
        (
            lambda f: services.submit_predictions(
                f["version"],
                f["split"],
                upload("p.json", detections_for(f["truth"])),
                f["users"]["reviewer"],
            ),
            PermissionDenied,
            "only engineers and leads of Shuttle Perception can",
        ),
        (
            lambda f: services.create_version(f["version"].detector, "1.4.0", f["users"]["lead"]),
            UploadError,
            "Forward camera already has a version labelled '1.4.0'",
        ),
        (
            lambda f: services.create_version(f["rival_detector"], "2.0", f["users"]["engineer"]),
            PermissionDenied,
            "engineer may not upload for Tram front",
        ),
        (
            lambda f: evaluation_services.load_split(
                name="bay-night", revision=1, truth=upload("again.json", split_dict(seed=9))
            ),
            UploadError,
            "bay-night rev 1 already exists and is frozen; load a corrected split as a new revision",
        ),
        (
            lambda f: evaluation_services.load_split(
                name="bay-night", revision=2, truth=upload("same.json", f["truth"])
            ),
            UploadError,
            "the same content is already frozen as bay-night rev 1",
        ),
        (
            lambda f: evaluation_services.load_split(
                name="ring-road",
                revision=1,
                truth=upload("dup.json", _duplicate_image_ids()),
                annotations="strict",  # by default the last entry counts, as in pycocotools
            ),
            engine.InputError,
            "dup.json: images[1]: field 'id': duplicate id",
        ),
        (
            lambda f: evaluation_services.load_split(
                name="ring-road", revision=1, truth=upload("broken.json", '{"images": [')
            ),
            engine.InputError,
            "broken.json: the JSON ends early",
        ),
        (
            lambda f: evaluation_services.load_split(
                name="ring-road",
                revision=1,
                truth=upload("boxes.csv", "image_id,label,x_min,y_min,x_max,y_max\n"),
            ),
            engine.InputError,
            "boxes.csv: a CSV split needs its images table",
        ),
    ],
    ids=[
        "empty-file",
        "other-team",
        "reviewer",
        "label-taken",
        "other-team-version",
        "split-revision-taken",
        "same-split-content",
        "duplicate-ids",
        "broken-split",
        "csv-without-images",
    ],
)
def test_refused_requests_store_nothing(
    version, split, split_truth, users, rival_detector, attempt, error, message
):
    before = _counts()
    fixtures = {
        "version": version,
        "split": split,
        "truth": split_truth,
        "users": users,
        "rival_detector": rival_detector,
    }
    with pytest.raises(error) as caught:
        attempt(fixtures)
    assert message in str(caught.value)
    assert _counts() == before


def _duplicate_image_ids():
    data = split_dict(seed=21)
    data["images"][1]["id"] = data["images"][0]["id"]
    return data


def test_upload_over_the_limit_is_refused(version, split, split_truth, users, settings):
    settings.BENCHBOOK_MAX_UPLOAD_BYTES = 1000
    before = _counts()
    with pytest.raises(UploadError, match="big.json: larger than the upload limit of 1,000 bytes"):
        services.submit_predictions(
            version, split, upload("big.json", detections_for(split_truth)), users["engineer"]
        )
    assert _counts() == before


def test_second_identical_upload_is_the_same_row(version, split, split_truth, users, run_tasks):
    dets = detections_for(split_truth)
    first = run_tasks(
        services.submit_predictions, version, split, upload("p.json", dets), users["engineer"]
    )
    before = _counts()
    again = run_tasks(
        services.submit_predictions, version, split, upload("renamed.json", dets), users["lead"]
    )
    assert again.pk == first.pk
    assert _counts() == before


def test_other_predictions_for_the_same_version_and_split_are_refused(
    version, split, split_truth, users, run_tasks
):
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    before = _counts()
    with pytest.raises(
        UploadConflict,
        match="already has predictions on bay-night rev 1 .p.json. whose evaluations are done",
    ):
        services.submit_predictions(
            version, split, upload("q.json", detections_for(split_truth, seed=7)), users["engineer"]
        )
    assert {k: v for k, v in _counts().items() if k != "files"} == {
        k: v for k, v in before.items() if k != "files"
    }


def test_refused_upload_for_a_new_label_leaves_no_version(detector, split, split_truth, users):
    before = _counts()
    with pytest.raises(UploadError):
        services.submit_for_label(
            detector, "2.0", split, upload("empty.json", b""), users["engineer"]
        )
    assert _counts() == before


def test_frozen_split_refuses_orm_edits(split):
    split.description = "edited"
    with pytest.raises(FrozenError, match="bay-night rev 1 is frozen"):
        split.save()
    with pytest.raises(FrozenError):
        split.delete()
    assert BenchmarkSplit.objects.get().description == ""


@pytest.mark.parametrize(
    "statement",
    [
        "UPDATE evaluation_benchmarksplit SET description = 'edited'",
        "UPDATE evaluation_benchmarksplit SET sha256 = 'x' WHERE id > 0",
        "DELETE FROM evaluation_benchmarksplit",
    ],
)
def test_frozen_split_refuses_raw_sql(split, statement):
    """Enforced by a trigger in the database, not only in Python."""
    with pytest.raises(DatabaseError, match="frozen"):
        with transaction.atomic(), connection.cursor() as cursor:
            cursor.execute(statement)
    fresh = BenchmarkSplit.objects.get()
    assert (fresh.description, fresh.sha256) == ("", split.sha256)
