"""The served OpenAPI schema against the API itself: schemathesis generates requests from
/api/schema/ and sends them through the WSGI app, as the lead (a token of theirs)."""

import pytest
import schemathesis
from django.contrib.auth import get_user_model
from django.core.files.uploadedfile import SimpleUploadedFile
from django.core.signals import request_finished, request_started
from django.db import close_old_connections
from django.test import override_settings
from hypothesis import HealthCheck, settings
from rest_framework.test import APIClient
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from benchbook.wsgi import application
from evaluation import services as evaluation_services
from evaluation.models import Evaluation
from releases import criteria, services, tokens
from releases.models import AuditEvent, PredictionSet

from .conftest import CLASSES, committed_for_module, detections_for, split_dict, upload

CHECKS = [
    not_a_server_error,
    response_schema_conformance,
    status_code_conformance,
    content_type_conformance,
]


def load(**config):
    """The schema, fetched through the app at collection (no database needed). A fixed
    seed makes every run send the same requests (one seed per operation derives from it)."""
    config = schemathesis.Config.from_dict({"seed": 20261202, **config})
    return schemathesis.openapi.from_wsgi("/api/schema/?format=json", application, config=config)


schema = load()

HYPOTHESIS = settings(
    max_examples=15,
    derandomize=True,
    database=None,
    deadline=None,
    # The data is set up once for the module; a test's examples share its transaction.
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)


def _store():
    """A team (lead, engineer), a detector with criteria, a split, a signed-off baseline,
    a judged candidate, a version whose scoring failed, another team's version."""
    User = get_user_model()
    lead, engineer, rival = (User.objects.create_user(n) for n in ("lead", "engineer", "rival"))
    team = services.create_team("Shuttle Perception", [(lead, "lead"), (engineer, "engineer")])
    detector = services.create_detector(team, "Forward camera", CLASSES, protocols=("coco", "voc"))
    rival_team = services.create_team("Tram Vision", [(rival, "lead")])
    rival_detector = services.create_detector(rival_team, "Tram front", CLASSES)
    truth = split_dict()
    split = evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", truth)
    )
    rules = [{"metric": "AP", "class": "mean", "split": "*", "kind": "max_drop", "tolerance": 0.5}]
    criteria.set_criteria(detector, lead, rules)
    # Each upload is scored, then judged, when it commits (the tasks run in-process).
    baseline = services.create_version(detector, "1.0", engineer)
    services.submit_predictions(baseline, split, upload("a.json", detections_for(truth)), engineer)
    services.sign_off(baseline, lead, "approved", "fine")
    candidate = services.create_version(detector, "1.1", engineer)
    services.submit_predictions(
        candidate, split, upload("b.json", detections_for(truth, seed=7)), engineer
    )
    broken = services.create_version(detector, "1.2", engineer)
    with override_settings(BENCHBOOK_INLINE_VALIDATION_BYTES=0):  # fails in the worker
        services.submit_predictions(broken, split, upload("c.json", b"[{"), engineer)
    other = services.create_version(rival_detector, "r1", rival)
    assert set(Evaluation.objects.values_list("state", flat=True)) == {"done", "failed"}
    _, token = tokens.create_token(lead, "schemathesis")
    return {
        "headers": {"Authorization": f"Bearer {token}"},
        # Stored ids for each kind of path: visible objects, then another team's.
        "ids": {
            "detectors": [detector.pk, rival_detector.pk],
            "versions": [candidate.pk, baseline.pk, broken.pk, other.pk],
            "evaluations": list(Evaluation.objects.order_by("pk").values_list("pk", flat=True)),
            "prediction-sets": list(PredictionSet.objects.values_list("pk", flat=True)),
            "splits": [split.pk],
            "audit-events": list(AuditEvent.objects.values_list("pk", flat=True)),
        },
    }


@pytest.fixture(scope="module")
def served(django_db_setup, django_db_blocker, tmp_path_factory):
    """The data, committed once for the module (``conftest.committed_for_module``)."""
    for stored, media in committed_for_module(django_db_blocker, tmp_path_factory, _store):
        yield {**stored, "media": media}


@pytest.fixture(autouse=True)
def _database(served, db, settings):
    """Each test runs in a transaction rolled back afterwards, on the module's data and
    files (tests/conftest.py gives every test an empty MEDIA_ROOT). The WSGI app shares
    this thread's connection; like Django's test client, keep it open between requests
    (closing it would end the test's transaction)."""
    settings.MEDIA_ROOT = served["media"]
    settings.BENCHBOOK_ENGINE_CACHE = served["media"] + "/engine-cache"
    request_started.disconnect(close_old_connections)
    request_finished.disconnect(close_old_connections)
    try:
        yield
    finally:
        request_started.connect(close_old_connections)
        request_finished.connect(close_old_connections)


@HYPOTHESIS
@schema.parametrize()
def test_generated_requests_conform(case, served):
    """Whatever schemathesis sends, valid or not: no 5xx, and every status and body is one
    the schema declares for the operation."""
    case.call_and_validate(headers=served["headers"], checks=CHECKS)


def _names_stored_objects(ctx):
    operation = ctx.operation
    return "{id}" in operation.path or (operation.method.upper(), operation.path) in {
        ("GET", "/api/v1/comparisons/"),
        ("POST", "/api/v1/versions/"),
        ("POST", "/api/v1/prediction-sets/"),
    }


def _stored(choices, generated):
    """One of the stored ids, picked by the generated value (so that examples vary)."""
    return choices[(generated if isinstance(generated, int) else 0) % len(choices)]


# Without the coverage phase (boundary and missing values, run by the test above).
@HYPOTHESIS
@load(phases={"coverage": {"enabled": False}}).include(_names_stored_objects).parametrize()
def test_requests_on_stored_objects_conform(case, served):
    """The same with the ids in the path, the query or the body replaced by stored
    objects' (a generated id is almost never one), so that real bodies are checked too."""
    ids = served["ids"]
    if "id" in (case.path_parameters or {}):
        kind = case.operation.path.split("/")[3]  # /api/v1/<kind>/{id}/...
        case.path_parameters["id"] = _stored(ids[kind], case.path_parameters["id"])
    for name in ("reference", "candidate"):
        if name in (case.query or {}):
            case.query[name] = _stored(ids["versions"], case.query[name])
    for name, kind in (("detector", "detectors"), ("split", "splits")):
        if isinstance(case.body, dict) and name in case.body:
            case.body[name] = _stored(ids[kind], case.body[name])
    case.call_and_validate(headers=served["headers"], checks=CHECKS)


def _long_name():
    return SimpleUploadedFile("é" * 200 + ".json", b"[]")  # 200 characters, 405 bytes


# Inputs that answered 500 before the fixes in releases/api/ (found by the tests above,
# or beside them), kept as plain regressions: (method, url, data, status, error path);
# a str is sent as raw JSON.
ODD_INPUTS = {
    "id beyond 64 bits (SQLite)": ("get", "versions/?detector=99999999999999999999999", None, 400, "detector"),
    "path id beyond 64 bits": ("get", "versions/99999999999999999999999/", None, 404, ""),  # was 404
    "no such day": ("get", "versions/?since=2000-02-30T00:00:00Z", None, 400, "since"),
    "past year 9999 in UTC": ("get", "versions/?since=9999-12-31T23:59:59-23:00", None, 400, "since"),
    "offset PostgreSQL refuses": ("get", "sign-offs/?until=0074-03-19T16:46:09%2B22:09", None, 200, None),
    "NUL in a query (PostgreSQL)": ("get", "detectors/?name=a%00b", None, 400, "name"),
    "NUL in a rule (PostgreSQL)": (
        "post",
        "detectors/{detector}/criteria/",
        '{"rules": [{"kind": "max_drop", "tolerance": 1, "tag": "n\\u0000"}]}',
        400,
        "rules[0].tag",
    ),
    "lone surrogate in a rule": (
        "post",
        "detectors/{detector}/criteria/",
        '{"rules": [{"kind": "max_drop", "tolerance": 1, "tag": "n\\ud800"}]}',
        400,
        "rules[0].tag",
    ),
    "file name over 255 bytes": (
        "post",
        "prediction-sets/",
        {"detector": "{detector}", "version": "9", "split": "{split}", "predictions": _long_name},
        201,  # stored under a name shortened to fit (evaluation.storage.fitted_name)
        None,
    ),
}  # fmt: skip


@pytest.mark.parametrize(
    ("method", "url", "data", "status", "path"), ODD_INPUTS.values(), ids=ODD_INPUTS
)
def test_odd_inputs_answer_client_errors(served, method, url, data, status, path):
    """Huge ids, impossible dates, odd offsets, NUL characters, long file names: a client
    error naming the field, or an answer."""
    ids = {"detector": served["ids"]["detectors"][0], "split": served["ids"]["splits"][0]}
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=served["headers"]["Authorization"])
    url = "/api/v1/" + url.format(**ids)
    if method == "get":
        response = client.get(url)
    elif isinstance(data, str):
        response = client.post(url, data, content_type="application/json")
    else:
        data = {k: v() if callable(v) else str(v).format(**ids) for k, v in data.items()}
        response = client.post(url, data, format="multipart")
    assert response.status_code == status, response.content
    if path is not None:
        body = response.json()
        assert set(body) >= {"status", "code", "message", "errors"} and body["status"] == status
        assert body["errors"][0]["path"] == path, body
