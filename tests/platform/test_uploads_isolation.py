"""No cross-team leak through shared bytes (issue 12 item 7): two teams upload identical
predictions; the bytes are stored once, but file name, uploader, upload time and the
evaluations each upload asked for belong to that upload. Neither team sees the other's
name, time or evaluations through pages, API lists and details, or audit events; list
filters by another team's ids answer exactly as for an unknown id."""

import datetime
import json

import pytest
from django.urls import reverse

from evaluation.models import Evaluation, PredictionFile
from releases import services
from releases.models import PredictionSet

from .conftest import detections_for, triggers_off, upload
from .test_api import API, client_for

pytestmark = pytest.mark.django_db

A_NAME = "shuttle-secret-run-17.json"
A_TIME = datetime.datetime(2026, 1, 5, 7, 30, tzinfo=datetime.UTC)


@pytest.fixture
def twins(detector, rival_detector, split, split_truth, users, run_tasks):
    """Team A (Shuttle Perception: coco and voc) uploads first; team B (Tram Vision:
    coco only) uploads the identical bytes under another name."""
    data = json.dumps(detections_for(split_truth))
    a = run_tasks(
        services.submit_for_label, detector, "1.4.0", split, upload(A_NAME, data), users["engineer"]
    )
    PredictionSet.objects.filter(pk=a.pk).update(uploaded_at=A_TIME)
    b = run_tasks(
        services.submit_for_label,
        rival_detector,
        "r1",
        split,
        upload("b.json", data),
        users["rival"],
    )
    assert PredictionFile.objects.count() == 1 and a.predictions_id == b.predictions_id
    a_voc = Evaluation.objects.get(predictions=a.predictions, protocol="voc")
    return {"a": a, "b": b, "a_voc": a_voc}


def _text(response):
    return json.dumps(response.json())


def test_each_upload_keeps_its_own_name_uploader_and_time(twins, users):
    b_sets = client_for(users["rival"]).get(API + "prediction-sets/").json()["results"]
    assert [(s["file_name"], s["uploaded_by"]) for s in b_sets] == [("b.json", "rival")]
    assert not b_sets[0]["uploaded_at"].startswith("2026-01-05")
    a_sets = client_for(users["engineer"]).get(API + "prediction-sets/").json()["results"]
    assert [(s["file_name"], s["uploaded_by"]) for s in a_sets] == [(A_NAME, "engineer")]
    assert a_sets[0]["uploaded_at"].startswith("2026-01-05T07:30")


def test_another_teams_evaluations_are_unknown(twins, users):
    b = client_for(users["rival"])
    listed = b.get(API + "evaluations/").json()["results"]
    assert {e["protocol"] for e in listed} == {"coco"}  # not A's voc evaluation
    assert {e["id"] for e in listed} == set(twins["b"].evaluations.values_list("pk", flat=True))
    unknown = b.get(API + "evaluations/999999/")
    hidden = b.get(API + f"evaluations/{twins['a_voc'].pk}/")
    assert hidden.status_code == unknown.status_code == 404
    assert hidden.json() == unknown.json()


@pytest.mark.parametrize("name", ["detector", "version"])
def test_filters_by_another_teams_ids_answer_as_unknown_ids(twins, users, name):
    b = client_for(users["rival"])
    a_id = twins["a"].version.detector_id if name == "detector" else twins["a"].version_id
    own = twins["b"].version.detector_id if name == "detector" else twins["b"].version_id
    for path in ("evaluations/", "prediction-sets/", "outcomes/"):
        foreign = b.get(API + path, {name: a_id})
        unknown = b.get(API + path, {name: 999999})
        assert foreign.status_code == unknown.status_code, path
        assert foreign.json() == unknown.json(), path
    assert b.get(API + "evaluations/", {name: own}).json()["count"] == 1  # coco of B's set


def test_audit_events_name_only_the_readers_own_upload(twins, users):
    b_events = client_for(users["rival"]).get(API + "audit-events/", {"page_size": 500})
    text = _text(b_events)
    assert A_NAME not in text and "2026-01-05" not in text
    subjects = {e["subject"] for e in b_events.json()["results"]}
    assert f"evaluation:{twins['a_voc'].pk}" not in subjects
    uploads = [e for e in b_events.json()["results"] if e["kind"] == "predictions uploaded"]
    assert [e["payload"]["file"] for e in uploads] == ["b.json"]
    a_text = _text(client_for(users["engineer"]).get(API + "audit-events/", {"page_size": 500}))
    assert "b.json" not in a_text and A_NAME in a_text


def test_pages_show_only_the_readers_own_upload(twins, users, client):
    client.force_login(users["rival"])
    assert client.get(f"/evaluations/{twins['a_voc'].pk}.json").status_code == 404
    page = client.get(reverse("version", args=[twins["b"].version_id])).content.decode()
    assert A_NAME not in page
    evaluations = page[page.index("<h2>Evaluations</h2>") :]
    assert ">voc<" not in evaluations and ">coco<" in evaluations
    assert "2026-01-05" not in page
    with triggers_off():  # planted: a finished evaluation cannot change otherwise
        Evaluation.objects.filter(pk=twins["a_voc"].pk).update(state="running")
    overview = client.get(reverse("overview")).content.decode()
    assert f"/evaluations/{twins['a_voc'].pk}.json" not in overview  # not B's to follow
    client.force_login(users["engineer"])
    overview = client.get(reverse("overview")).content.decode()
    assert f"/evaluations/{twins['a_voc'].pk}.json" in overview  # A's own, in progress
    page = client.get(reverse("version", args=[twins["a"].version_id])).content.decode()
    assert "b.json" not in page and "rival" not in page


def test_a_replacement_reads_only_its_own_sets_evaluations(
    twins, detector, split, split_truth, users, run_tasks
):
    """Whether a set may be replaced depends on its own evaluations, not on those
    another team's identical upload asked for: B's set (coco done) stays, even when A's
    voc evaluation of the same bytes failed."""
    from evaluation.services import UploadConflict

    with triggers_off():  # planted: a finished evaluation cannot change otherwise
        Evaluation.objects.filter(pk=twins["a_voc"].pk).update(state="failed", error="x")
    with pytest.raises(UploadConflict, match="whose evaluations are done"):
        services.submit_predictions(
            twins["b"].version,
            split,
            upload("b2.json", detections_for(split_truth, seed=4)),
            users["rival"],
        )


def test_each_team_has_evaluations_of_its_own(twins, users, client):
    """The identical bytes are scored once per team (``Evaluation.scope``): B's
    evaluation shows B's queue and finish times and attempts, never A's, through the
    API (list and detail), the live-status JSON and the version page."""
    a_coco = twins["a"].evaluations.get(protocol="coco")
    b_coco = twins["b"].evaluations.get()
    assert a_coco.pk != b_coco.pk and b_coco.protocol == "coco"
    assert (a_coco.scope, b_coco.scope) != ("", "") and a_coco.scope != b_coco.scope
    assert b_coco.file_name == "b.json" and a_coco.file_name == A_NAME
    with triggers_off():  # planted: A's evaluation ran long ago, three times
        Evaluation.objects.filter(predictions=twins["a"].predictions, scope=a_coco.scope).update(
            queued_at=A_TIME, started_at=A_TIME, finished_at=A_TIME, attempts=3
        )
    b = client_for(users["rival"])
    listed = b.get(API + "evaluations/").json()["results"]
    assert [e["id"] for e in listed] == [b_coco.pk] and listed[0]["attempts"] == 1
    detail = b.get(API + f"evaluations/{b_coco.pk}/")
    assert "2026-01-05" not in _text(b.get(API + "evaluations/")) + _text(detail)
    client.force_login(users["rival"])
    status = client.get(f"/evaluations/{b_coco.pk}.json").content.decode()
    page = client.get(reverse("version", args=[twins["b"].version_id])).content.decode()
    assert "2026-01-05" not in status + page and A_NAME not in status + page


def test_a_failure_names_the_readers_own_file(
    detector, rival_detector, split, users, run_tasks, settings
):
    """A file the worker refuses (the inline check is off, as for a big file) fails
    each team's evaluation with a message naming that team's own file name."""
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0
    bad = json.dumps([{"image_id": 1, "category_id": 1, "bbox": [0, 0, 1], "score": 0.5}])
    a = run_tasks(
        services.submit_for_label, detector, "1.4.0", split, upload(A_NAME, bad), users["engineer"]
    )
    b = run_tasks(
        services.submit_for_label,
        rival_detector,
        "r1",
        split,
        upload("b.json", bad),
        users["rival"],
    )
    (b_eval,) = b.evaluations.all()
    assert b_eval.state == "failed" and "b.json" in b_eval.error
    assert A_NAME not in b_eval.error + json.dumps(b_eval.error_detail)
    assert all(A_NAME in e.error for e in a.evaluations.all())
    text = _text(client_for(users["rival"]).get(API + f"evaluations/{b_eval.pk}/"))
    assert A_NAME not in text and "b.json" in text


def test_migration_gives_each_team_its_own_evaluation(twins):
    """Rows shared before scopes (scope ''): the team that asked first keeps the row,
    every other team's sets get a queued evaluation of their own (the sweep sends it)."""
    import importlib

    from django.apps import apps

    migration = importlib.import_module("releases.migrations.0015_evaluation_scopes")
    a, b = twins["a"], twins["b"]
    shared = a.evaluations.get(protocol="coco")
    with triggers_off():  # planted as before 0015 (which runs before scope is guarded)
        Evaluation.objects.filter(pk=shared.pk).update(scope="", file_name="")
        Evaluation.objects.filter(pk__in=b.evaluations.all()).update(scope="elsewhere")
        b.evaluations.set([shared])
        migration.scope_existing(apps, None)
    shared.refresh_from_db()
    assert shared.scope == services.evaluation_scope(a.version.detector.team_id)
    assert shared.file_name == A_NAME and list(a.evaluations.filter(protocol="coco")) == [shared]
    (own,) = b.evaluations.all()
    assert own.pk != shared.pk and own.state == "queued" and own.file_name == "b.json"
    assert own.scope == services.evaluation_scope(b.version.detector.team_id)
