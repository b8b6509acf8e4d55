"""Downloads of an evaluation's outcome records: streamed CSV and JSON Lines through the
page and the API, behind the team check; the bytes are the engine's export of the
stored records (nothing re-matched)."""

import collections.abc
import csv
import io
import json
import types

import pytest
from django.http import StreamingHttpResponse
from django.urls import reverse
from rest_framework.test import APIClient

from evaluation import outcomes
from evaluation import services as evaluation_services
from evaluation.engine import export
from evaluation.models import Evaluation
from releases import services, tokens

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


@pytest.fixture
def scored(users, detector, split, split_truth, run_tasks):
    version = services.create_version(detector, "1.5", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    return Evaluation.objects.get(protocol="coco", state="done")


def _body(response):
    assert isinstance(response, StreamingHttpResponse)
    # an iterator over the engine's generator of blocks, not a list: the response
    # never holds the whole file (bench/records_export.py measures the memory)
    assert isinstance(response.streaming_content, collections.abc.Iterator)
    assert isinstance(response._iterator, types.GeneratorType)
    return b"".join(response.streaming_content).decode()


def test_page_downloads_are_the_engines_export_of_the_stored_records(client, users, scored):
    client.force_login(users["engineer"])
    card = outcomes.scorecard_of(scored)
    records, truth = outcomes.records_of(card), outcomes.truth_of(scored)
    page = client.get(reverse("version", args=[scored.prediction_sets.get().version_id]))
    assert reverse("records-download", args=[scored.pk, "csv"]) in page.content.decode()
    response = client.get(reverse("records-download", args=[scored.pk, "csv"]))
    assert response["Content-Type"] == "text/csv; charset=utf-8"
    assert f"evaluation-{scored.pk}-records.csv" in response["Content-Disposition"]
    text = _body(response)
    assert text == "".join(export.csv_chunks(records, truth))
    rows = list(csv.DictReader(io.StringIO(text)))
    detections = [r for r in rows if r["row"] == "detection"]
    boxes = [r for r in rows if r["row"] == "box"]
    assert len(detections) == records.n_detections and len(boxes) == truth.n_boxes
    # The TP rows are the scorecard's true positives at the primary IoU (all sizes).
    tp = sum(1 for r in detections if r["outcome"] == "tp")
    assert (
        tp
        == int(records.outcomes(0, 0)[0].sum())
        == sum(int(row.tp) for row in card.classes.exclude(class_name=""))
    )
    lines = _body(client.get(reverse("records-download", args=[scored.pk, "jsonl"]))).splitlines()
    assert [json.loads(line)["reason"] for line in lines] == [r["reason"] for r in rows]
    assert client.get(reverse("records-download", args=[scored.pk, "xml"])).status_code == 404
    # every row says how it was scored: as the stored result records it
    result = Evaluation.objects.get(pk=scored.pk).scorecard.result
    said = {
        (r["protocol"], r["engine_version"], r["box_policy"], r["truth_fingerprint"]) for r in rows
    }
    assert said == {("coco", scored.engine_version, scored.box_policy, result["truth_fingerprint"])}
    assert {r["protocol_sha256"] for r in rows} == {result["protocol_sha256"]}


def test_a_download_names_the_engine_that_scored_it(
    client, users, detector, split, split_truth, run_tasks, monkeypatch
):
    """Records stored by an earlier engine (its version written on the evaluation and
    result at scoring) are downloaded under that engine's version, not today's."""
    from evaluation.engine import provenance

    with monkeypatch.context() as patch:
        patch.setattr(provenance, "ENGINE_VERSION", "2.17.0")
        version = services.create_version(detector, "1.6", users["engineer"])
        sets = upload("p.json", detections_for(split_truth))
        run_tasks(services.submit_predictions, version, split, sets, users["engineer"])
    scored = Evaluation.objects.get(protocol="coco", state="done")
    assert scored.engine_version == "2.17.0"
    client.force_login(users["engineer"])
    text = _body(client.get(reverse("records-download", args=[scored.pk, "csv"])))
    assert {r["engine_version"] for r in csv.DictReader(io.StringIO(text))} == {"2.17.0"}


def test_api_downloads_with_a_token_and_refusals(users, scored, rival_detector):
    _, token = tokens.create_token(users["engineer"], "ci")
    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {token}")
    for fmt, kind in (("csv", "text/csv"), ("jsonl", "application/x-ndjson")):
        response = api.get(f"/api/v1/evaluations/{scored.pk}/records.{fmt}")
        assert response.status_code == 200 and response["Content-Type"].startswith(kind)
        assert len(_body(response)) > 100
    for name in ("rival", "outsider"):
        _, other = tokens.create_token(users[name], "ci")
        api.credentials(HTTP_AUTHORIZATION=f"Bearer {other}")
        response = api.get(f"/api/v1/evaluations/{scored.pk}/records.csv")
        assert response.status_code == 404 and response.json()["code"] == "not_found"
    api.credentials()
    assert api.get(f"/api/v1/evaluations/{scored.pk}/records.csv").status_code == 401


def test_an_unfinished_evaluation_has_nothing_to_download(users, detector, split, split_truth):
    version = services.create_version(detector, "1.6", users["engineer"])
    services.submit_predictions(  # no task runs: the evaluations stay queued
        version, split, upload("q.json", detections_for(split_truth, seed=9)), users["engineer"]
    )
    queued = Evaluation.objects.filter(state="queued").first()
    _, token = tokens.create_token(users["engineer"], "ci")
    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {token}")
    response = api.get(f"/api/v1/evaluations/{queued.pk}/records.jsonl")
    assert response.status_code == 409 and "queued" in response.json()["message"]
    client = APIClient()
    client.force_login(users["engineer"])
    assert client.get(reverse("records-download", args=[queued.pk, "csv"])).status_code == 404


def test_downloads_of_a_split_without_annotations(users, detector, run_tasks):
    """A split of background images only: each detection row relates to no box (empty
    box id), and there is no box row — a download, not a server error."""
    truth = {
        "images": [{"id": 1, "width": 640, "height": 480}, {"id": 2, "width": 640, "height": 480}],
        "categories": [{"id": 1, "name": "car"}],
        "annotations": [],
    }
    empty = evaluation_services.load_split(
        name="empty-lot", revision=1, truth=upload("empty-lot.json", truth)
    )
    dets = [{"image_id": 1, "category_id": 1, "bbox": [5, 5, 40, 30], "score": 0.7}]
    version = services.create_version(detector, "1.7", users["engineer"])
    run_tasks(
        services.submit_predictions, version, empty, upload("bg.json", dets), users["engineer"]
    )
    scored = Evaluation.objects.get(split=empty, protocol="coco", state="done")
    client = APIClient()
    client.force_login(users["engineer"])
    rows = list(
        csv.DictReader(
            io.StringIO(_body(client.get(reverse("records-download", args=[scored.pk, "csv"]))))
        )
    )
    assert [(r["row"], r["outcome"], r["box_id"]) for r in rows] == [("detection", "fp", "")]
    lines = _body(client.get(reverse("records-download", args=[scored.pk, "jsonl"]))).splitlines()
    assert [json.loads(line)["box_id"] for line in lines] == [None]
