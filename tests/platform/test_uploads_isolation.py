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
