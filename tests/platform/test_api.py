"""The REST API: tokens, every endpoint, error bodies, pagination, filters, limits."""

import json
import re

import pytest
from django.core.cache import cache
from django.core.exceptions import PermissionDenied
from django.core.files.uploadedfile import SimpleUploadedFile
from django.core.management import call_command
from django.urls import get_resolver, reverse
from rest_framework.test import APIClient

from evaluation.models import BenchmarkSplit, Evaluation, PredictionFile
from releases import criteria, services, tokens
from releases.models import ApiToken, AuditEvent, ModelVersion, PredictionSet

from .conftest import detections_for, split_dict

pytestmark = pytest.mark.django_db

API = "/api/v1/"


def client_for(user):
    _, token = tokens.create_token(user, "tests")
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"Bearer {token}")
    return client


@pytest.fixture
def api(users):
    cache.clear()  # throttle counters
    made = {}

    def get(name):
        if name not in made:
            made[name] = client_for(users[name])
        return made[name]

    return get


def file(name, content):
    if not isinstance(content, (bytes, str)):
        content = json.dumps(content)
    data = content.encode() if isinstance(content, str) else content
    return SimpleUploadedFile(name, data, content_type="application/octet-stream")


@pytest.fixture
def uploaded(api, detector, split, split_truth, run_tasks):
    """Version 1.4.0 uploaded through the API and scored (tasks run in-process)."""
    response = run_tasks(
        api("engineer").post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "1.4.0",
            "split": split.pk,
            "predictions": file("p.json", detections_for(split_truth)),
            "source_commit": "a1b2c3d",
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    return response.json()


def _error(response, status, path=None):
    body = response.json()
    assert response.status_code == status, body
    assert set(body) >= {"status", "code", "message", "errors"}
    assert body["status"] == status
    if path is not None:
        assert body["errors"][0]["path"] == path, body
    return body


# Authentication ------------------------------------------------------------------


def test_tokens_are_stored_hashed_and_revocable(users):
    row, token = tokens.create_token(users["engineer"], "ci")
    assert token.startswith("bbk_") and len(token) > 40
    assert not ApiToken.objects.filter(digest=token).exists()
    assert row.digest == tokens.digest(token) and token not in row.prefix + row.name
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"Bearer {token}")
    assert client.get(API + "me/").json()["username"] == "engineer"
    tokens.revoke_token(users["engineer"], row.pk)
    body = _error(client.get(API + "me/"), 401)
    assert body["message"] == "Authorization header: unknown or revoked token"


def test_no_credentials_and_bad_tokens_are_401(users):
    _error(APIClient().get(API + "detectors/"), 401)
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION="Bearer bbk_not-a-token")
    _error(client.get(API + "detectors/"), 401)


def test_a_user_revokes_only_their_own_tokens(users):
    row, _ = tokens.create_token(users["engineer"], "ci")
    with pytest.raises(PermissionDenied):
        tokens.revoke_token(users["lead"], row.pk)
    assert ApiToken.objects.get(pk=row.pk).active


def test_the_session_works_for_the_browser(client, users, detector):
    client.force_login(users["lead"])
    assert client.get(API + "detectors/").json()["results"][0]["name"] == "Forward camera"


def test_token_command_creates_lists_and_revokes(users, capsys):
    call_command("api_token", "create", "engineer", "--name", "nightly")
    token = capsys.readouterr().out.strip()
    assert tokens.user_for(token).user == users["engineer"]
    call_command("api_token", "list", "engineer")
    listed = capsys.readouterr().out
    assert "nightly" in listed and "active" in listed and token not in listed
    row = ApiToken.objects.get(name="nightly")
    call_command("api_token", "revoke", str(row.pk))
    assert tokens.user_for(token) is None


def test_tokens_page_shows_a_new_token_once(client, users):
    client.force_login(users["engineer"])
    response = client.post(reverse("tokens"), {"action": "create", "name": "laptop"})
    token = response.context["new_token"]["token"]
    assert token in response.content.decode() and response["Cache-Control"] == "no-store"
    page = client.get(reverse("tokens")).content.decode()
    assert "laptop" in page and token not in page
    row = ApiToken.objects.get(name="laptop")
    client.post(reverse("tokens"), {"action": "revoke", "token": row.pk})
    assert not ApiToken.objects.get(pk=row.pk).active
    client.force_login(users["lead"])  # someone else's token: not found
    mine, _ = tokens.create_token(users["engineer"], "other")
    assert client.post(reverse("tokens"), {"action": "revoke", "token": mine.pk}).status_code == 404


# The pipeline's path -------------------------------------------------------------


def test_upload_score_and_read_everything(api, uploaded, detector, split, users):
    engineer = api("engineer")
    version_id = uploaded["version"]
    assert uploaded["version_label"] == "1.4.0" and uploaded["split_name"] == "bay-night rev 1"
    verdict = engineer.get(f"{API}versions/{version_id}/verdict/").json()
    assert (verdict["state"], verdict["no_criteria"]) == ("pass", True)
    assert {e["state"] for e in verdict["evaluations"]} == {"done"}
    assert {e["protocol"] for e in verdict["evaluations"]} == {"coco", "voc"}

    results = engineer.get(f"{API}versions/{version_id}/results/").json()
    (entry,) = results["splits"]
    assert entry["scored"] and entry["protocol"] == "coco"
    assert [c["class"] for c in entry["classes"]] == ["car", "pedestrian", "cyclist"]
    card = Evaluation.objects.get(pk=entry["evaluation"]).scorecard
    assert entry["summary"]["AP"] == card.summary["AP"]
    assert entry["other_protocols"]["voc"] is not None

    result = engineer.get(f"{API}evaluations/{entry['evaluation']}/result/").json()
    assert result["summary"] == entry["summary"]
    assert set(result["result"]["per_class"]) == {"car", "pedestrian", "cyclist"}

    detail = engineer.get(f"{API}versions/{version_id}/").json()
    assert (detail["state"], detail["sign_off"], detail["source_commit"]) == (
        "candidate",
        None,
        "a1b2c3d",
    )
    history = engineer.get(f"{API}detectors/{detector.pk}/history/").json()
    assert history["series"][0]["values"] == [round(card.summary["AP"], 4)]


def test_criteria_comparison_flags_sign_off_and_evidence(
    api, uploaded, detector, split, split_truth, users, run_tasks
):
    lead = api("lead")
    rules = [{"metric": "AP", "class": "mean", "split": "*", "kind": "max_drop", "tolerance": 1}]
    response = run_tasks(
        lead.post, f"{API}detectors/{detector.pk}/criteria/", {"rules": rules}, format="json"
    )  # the candidate is judged again against the new criteria (in-process tasks)
    assert response.status_code == 201 and response.json()["number"] == 1
    baseline_id = uploaded["version"]
    signed = lead.post(
        f"{API}versions/{baseline_id}/sign-off/",
        {"decision": "approved", "comment": "fine"},
        format="json",
    )
    assert signed.status_code == 201 and signed.json()["decided_by"] == "lead"
    assert lead.get(f"{API}detectors/{detector.pk}/").json()["baseline"] == baseline_id

    worse = [d for d in detections_for(split_truth) if d["category_id"] != 1]
    run_tasks(
        api("engineer").post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "1.5.0",
            "split": split.pk,
            "predictions": file("worse.json", worse),
        },
        format="multipart",
    )
    candidate = ModelVersion.objects.get(label="1.5.0")
    verdict = lead.get(f"{API}versions/{candidate.pk}/verdict/").json()
    assert verdict["state"] == "regression" and verdict["outcome_counts"]["fail"] == 1
    flags = lead.get(f"{API}flags/", {"detector": detector.pk}).json()["results"]
    assert [(f["version"], f["status"], f["rule_number"]) for f in flags] == [
        (candidate.pk, "fail", 1)
    ]
    assert lead.get(f"{API}outcomes/", {"status": "pass"}).json()["count"] == 0
    assert lead.get(f"{API}versions/{candidate.pk}/").json()["state"] == "blocked"

    comparison = lead.get(
        f"{API}comparisons/", {"reference": baseline_id, "candidate": candidate.pk}
    ).json()
    (entry,) = comparison["splits"]
    car = next(d for d in entry["deltas"] if d["class"] == "car")
    assert car["candidate"] is None or car["delta"] < 0  # the car detections were removed

    evidence = lead.get(f"{API}versions/{candidate.pk}/evidence/").json()
    assert evidence["caution"].startswith("Benchmark metrics support")
    assert evidence["outcomes"][0]["status"] == "fail" and evidence["audit"]["chain_intact"]
    html = lead.get(f"{API}versions/{candidate.pk}/evidence/", {"format": "html"})
    assert html["Content-Type"].startswith("text/html")
    assert "Evidence report" in html.content.decode() and "ISO 26262" in html.content.decode()

    refused = lead.post(
        f"{API}versions/{candidate.pk}/sign-off/",
        {"decision": "approved", "comment": "ship it"},
        format="json",
    )
    assert "override and needs a written justification" in _error(refused, 409)["message"]
    sign_offs = lead.get(f"{API}sign-offs/", {"decision": "approved"}).json()["results"]
    assert [s["version"] for s in sign_offs] == [baseline_id]
    events = lead.get(f"{API}audit-events/")
    assert events.status_code == 200, events.json()
    kinds = [e["kind"] for e in events.json()["results"]]
    assert kinds.count("predictions uploaded") == 2 and "criteria changed" in kinds
    assert "signed off" in kinds


def test_the_same_file_for_a_new_version_is_judged_too(
    api, uploaded, detector, split, split_truth, run_tasks
):
    criteria.set_criteria(
        detector,
        detector.team.memberships.get(role="lead").user,
        [{"metric": "AP", "class": "mean", "split": "*", "kind": "min_value", "threshold": 0.01}],
    )
    response = run_tasks(
        api("engineer").post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "1.4.1",
            "split": split.pk,
            "predictions": file("again.json", detections_for(split_truth)),
        },
        format="multipart",
    )
    assert response.json()["sha256"] == uploaded["sha256"]
    verdict = api("engineer").get(f"{API}versions/{response.json()['version']}/verdict/").json()
    assert verdict["state"] == "pass"


def test_versions_can_be_registered_before_upload(api, detector):
    response = api("engineer").post(
        API + "versions/", {"detector": detector.pk, "label": "2.0"}, format="json"
    )
    # Its verdict is incomplete (nothing uploaded): the state badge reads the same verdict.
    assert response.status_code == 201 and response.json()["state"] == "blocked"
    again = api("engineer").post(
        API + "versions/", {"detector": detector.pk, "label": "2.0"}, format="json"
    )
    assert "already has a version labelled '2.0'" in _error(again, 400)["message"]
    verdict = api("engineer").get(f"{API}versions/{response.json()['id']}/verdict/").json()
    assert verdict["state"] == "incomplete" and verdict["reasons"] == ["no predictions uploaded"]


def test_splits_load_through_the_api(api, team):
    response = api("engineer").post(
        API + "splits/",
        {"name": "ring-road", "revision": 1, "truth": file("ring.json", split_dict(seed=9))},
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    assert response.json()["sha256"] == BenchmarkSplit.objects.get(name="ring-road").sha256
    listed = api("reviewer").get(API + "splits/", {"name": "ring-road"}).json()
    assert [s["revision"] for s in listed["results"]] == [1]


# Error bodies --------------------------------------------------------------------


def test_a_bad_split_file_names_file_record_and_field(api, team):
    truth = split_dict(seed=9)
    truth["annotations"][3]["bbox"] = [1, 2, 5]
    response = api("engineer").post(
        API + "splits/",
        {"name": "ring-road", "revision": 1, "truth": file("ring.json", truth)},
        format="multipart",
    )
    body = _error(response, 400, path="truth")
    assert body["code"] == "invalid_file"
    assert body["file"] == "ring.json" and body["record"] == "annotations[3]"
    assert body["field"] == "bbox"
    assert not BenchmarkSplit.objects.filter(name="ring-road").exists()


def test_a_bad_rule_names_its_path(api, detector):
    rules = [{"metric": "AP", "class": "mean", "split": "*", "kind": "min_value", "threshold": 3}]
    response = api("lead").post(
        f"{API}detectors/{detector.pk}/criteria/", {"rules": rules}, format="json"
    )
    body = _error(response, 400, path="rules[0].threshold")
    assert "must be a number in [0.0, 1.0], got 3" in body["message"]
    assert not detector.criteria.exists()


def test_missing_fields_and_bad_parameters_name_their_path(api, detector, split):
    response = api("engineer").post(
        API + "prediction-sets/", {"detector": detector.pk, "split": split.pk}, format="multipart"
    )
    body = _error(response, 400)
    assert {e["path"] for e in body["errors"]} == {"version", "predictions"}
    _error(api("engineer").get(API + "versions/", {"since": "yesterday"}), 400, path="since")
    _error(api("engineer").get(API + "evaluations/", {"state": "cooking"}), 400, path="state")
    _error(api("engineer").get(API + "versions/", {"detector": "x"}), 400, path="detector")
    _error(api("engineer").get(API + "comparisons/"), 400, path="reference")


def test_an_empty_file_is_refused_and_nothing_is_stored(api, detector, split):
    response = api("engineer").post(
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "9.9",
            "split": split.pk,
            "predictions": file("empty.json", b""),
        },
        format="multipart",
    )
    assert "empty" in _error(response, 400, path="predictions")["message"]
    assert not ModelVersion.objects.filter(label="9.9").exists()
    assert not PredictionFile.objects.exists()


def test_uploads_over_the_limit_are_refused_before_reading(api, detector, split, settings):
    settings.BENCHBOOK_MAX_UPLOAD_BYTES = 1000
    big = file("big.json", b"[" + b" " * 2_000_000 + b"]")
    response = api("engineer").post(
        API + "prediction-sets/",
        {"detector": detector.pk, "version": "9.9", "split": split.pk, "predictions": big},
        format="multipart",
    )
    assert "the upload limit is 1000 bytes" in _error(response, 413)["message"]
    small_over = file("over.json", b"[" + b" " * 5000 + b"]")  # under the envelope slack
    response = api("engineer").post(
        API + "prediction-sets/",
        {"detector": detector.pk, "version": "9.9", "split": split.pk, "predictions": small_over},
        format="multipart",
    )
    assert "limit" in _error(response, 400)["message"]
    assert not PredictionSet.objects.exists() and not PredictionFile.objects.exists()


def test_tokens_are_throttled(api, detector, settings):
    settings.BENCHBOOK_TOKEN_RATE = "3/minute"
    client = api("engineer")
    statuses = [client.get(API + "detectors/").status_code for _ in range(4)]
    assert statuses == [200, 200, 200, 429]
    _error(client.get(API + "detectors/"), 429)


def test_unknown_objects_are_404_with_the_same_body(api):
    _error(api("engineer").get(f"{API}versions/999999/"), 404)
    _error(api("engineer").get(f"{API}evaluations/999999/result/"), 404)
    # A path no route matches never reaches DRF: the project's 404 handler answers.
    body = _error(api("engineer").get(f"{API}versions/abc/"), 404)
    assert body["message"] == "no such URL: /api/v1/versions/abc/"
    html = api("engineer").get(f"{API}versions/999999/evidence/", {"format": "html"})
    assert html["Content-Type"] == "application/json"
    _error(html, 404)


def test_criteria_with_unstorable_text_are_refused_on_the_page_too(client, detector, users):
    """PostgreSQL keeps no NUL in text: the service refuses it, so the page does as well."""
    client.force_login(users["lead"])
    rules = [
        {
            "metric": "AP",
            "class": "mean",
            "split": "*",
            "kind": "max_drop",
            "tolerance": 1,
            "tag": "ni\u0000ght",
        }
    ]
    page = client.post(reverse("criteria", args=[detector.pk]), {"rules": json.dumps(rules)})
    assert page.status_code == 400
    assert "rules[0].tag: NUL and surrogate characters are not allowed" in page.content.decode()
    assert not detector.criteria.exists()


# Lists ---------------------------------------------------------------------------


def test_lists_paginate_and_filter(api, detector, rival_detector, users):
    import datetime

    from django.utils import timezone

    start = timezone.now() - datetime.timedelta(days=30)
    for i in range(7):
        services.create_version(
            detector, f"0.{i}", users["engineer"], created_at=start + datetime.timedelta(days=i)
        )
    services.create_version(rival_detector, "r1", users["rival"])
    client = api("engineer")
    page = client.get(API + "versions/", {"page_size": 3}).json()
    assert page["count"] == 7 and len(page["results"]) == 3 and page["next"]
    labels = [v["label"] for v in client.get(page["next"]).json()["results"]]
    assert labels == ["0.3", "0.4", "0.5"]
    since = (start + datetime.timedelta(days=2)).isoformat()
    until = (start + datetime.timedelta(days=4)).isoformat()
    window = client.get(API + "versions/", {"since": since, "until": until}).json()
    assert [v["label"] for v in window["results"]] == ["0.2", "0.3"]
    by_label = client.get(API + "versions/", {"detector": detector.pk, "label": "0.6"}).json()
    assert by_label["count"] == 1
    # The reviewer reads every team, the rival's detector included.
    assert api("reviewer").get(API + "versions/").json()["count"] == 8
    assert api("rival").get(API + "versions/").json()["count"] == 1


# The schema ----------------------------------------------------------------------


def test_the_schema_describes_every_endpoint(client):
    response = client.get("/api/schema/", HTTP_ACCEPT="application/vnd.oai.openapi+json")
    schema = json.loads(response.content)
    assert schema["openapi"].startswith("3.")
    documented = set(schema["paths"])
    served = set()
    for pattern in get_resolver().url_patterns:
        if str(pattern.pattern) == "api/":
            for sub in pattern.url_patterns:
                if str(sub.pattern) == "v1/":
                    for endpoint in sub.url_patterns:
                        route = str(endpoint.pattern).replace("<int:pk>", "{id}")
                        route = re.sub(r"<int:(\w+)>", r"{\1}", route)
                        served.add("/api/v1/" + route)
    assert len(served) >= 24
    assert served == documented


def test_the_docs_page_is_served_without_a_cdn(client):
    page = client.get("/api/docs/").content.decode()
    assert "swagger-ui" in page and "/api/schema/" in page
    assert "cdn" not in page.lower() and "unpkg" not in page.lower()


def test_list_queries_stay_flat_as_rows_grow(api, detector, split, split_truth, users, run_tasks):
    """Like the pages (test_dashboard.py): a list costs the same queries for 2 or 6 rows."""
    from django.db import connection
    from django.test.utils import CaptureQueriesContext

    client = api("reviewer")
    client.get(API + "me/")  # authenticate once, so last_used_at is not written below
    lists = [
        "detectors/",
        "versions/",
        "prediction-sets/",
        "evaluations/",
        "outcomes/",
        "sign-offs/",
        "audit-events/",
    ]
    criteria.set_criteria(
        detector,
        users["lead"],
        [{"metric": "AP", "class": "*", "split": "*", "kind": "min_value", "threshold": 0.9}],
    )

    def add_versions(labels):
        for label in labels:
            version = services.create_version(detector, label, users["engineer"])
            dets = [d for d in detections_for(split_truth) if d["score"] > 0.1 * len(label)]
            run_tasks(
                services.submit_predictions,
                version,
                split,
                file(f"{label}.json", dets),
                users["engineer"],
            )
            services.sign_off(version, users["lead"], "rejected", "no")

    def counts():
        out = {}
        for path in lists:
            with CaptureQueriesContext(connection) as queries:
                assert client.get(API + path).status_code == 200
            out[path] = len(queries)
        return out

    add_versions(["a", "bb"])
    few = counts()
    add_versions(["ccc", "dddd", "e", "ff"])
    assert counts() == few


def test_detail_endpoints_return_their_object_and_hide_other_teams(api, uploaded, rival_detector):
    prediction_set = PredictionSet.objects.get(pk=uploaded["id"])
    evaluation = Evaluation.objects.filter(predictions=prediction_set.predictions).first()
    event = AuditEvent.objects.get(subject=f"prediction-set:{prediction_set.pk}")
    details = {
        f"prediction-sets/{prediction_set.pk}/": ("sha256", prediction_set.predictions.sha256),
        f"evaluations/{evaluation.pk}/": ("state", "done"),
        f"audit-events/{event.pk}/": ("hash", event.hash),
        f"splits/{prediction_set.split_id}/": ("sha256", prediction_set.split.sha256),
        f"versions/{prediction_set.version_id}/": ("label", "1.4.0"),
        f"detectors/{prediction_set.version.detector_id}/": ("name", "Forward camera"),
    }
    for path, (key, value) in details.items():
        assert api("engineer").get(API + path).json()[key] == value, path
        status = 200 if path.startswith("splits/") else 404  # splits are shared benchmarks
        assert api("rival").get(API + path).status_code == status, path
    rival_version = services.create_version(
        rival_detector, "r1", rival_detector.team.memberships.get().user
    )
    response = api("reviewer").get(
        API + "comparisons/",
        {"reference": prediction_set.version_id, "candidate": rival_version.pk},
    )
    _error(response, 400, path="candidate")
    _error(
        api("rival").get(
            API + "comparisons/",
            {"reference": prediction_set.version_id, "candidate": rival_version.pk},
        ),
        404,
    )


def test_a_bad_table_of_a_csv_split_is_named_by_its_field(api, team):
    """A CSV split has two uploads; the error says which one, whatever the files are called."""
    boxes = "image_id,label,x_min,y_min,x_max,y_max\nf1,car,10,10,90,60\nf2,car,5,5,25,70\n"
    frames = "image_id,width,height,tags\nf1,1280,720,night\nf1,640,480,day\n"
    response = api("engineer").post(
        API + "splits/",
        {"name": "kerb-stops", "revision": 1, "truth": file("boxes.csv", boxes),
         "images": file("frames.csv", frames)},
        format="multipart",
    )  # fmt: skip
    body = _error(response, 400, path="images")
    assert body["file"] == "frames.csv" and body["field"] == "image_id"
    bad_boxes = boxes.replace("90,60", "90,oops")
    response = api("engineer").post(
        API + "splits/",
        {"name": "kerb-stops", "revision": 1, "truth": file("boxes.csv", bad_boxes),
         "images": file("frames.csv", frames.replace("f1,640,480", "f2,640,480"))},
        format="multipart",
    )  # fmt: skip
    body = _error(response, 400, path="truth")
    assert body["file"] == "boxes.csv"
    assert not BenchmarkSplit.objects.filter(name="kerb-stops").exists()
