"""Who may do what through the API, role by role: the statuses are exact, a refusal has
the one error body, and a refused write stores nothing. The rules are the pages'
(DEVELOPERS.md, "Permissions"): members see their team's objects, a reviewer anywhere
reads every team's, other teams' objects are 404; engineers and leads of the owning
team write versions and predictions, its leads criteria and sign-offs; engineers and
leads of any team load splits, which everyone reads; a reviewer never writes (403)."""

import json
import types

import pytest
from django.contrib.auth import get_user_model
from django.core.files.uploadedfile import SimpleUploadedFile
from rest_framework.test import APIClient

from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit, Evaluation, PredictionFile
from releases import services, tokens
from releases.models import (
    AuditEvent,
    ModelVersion,
    PredictionSet,
    ReleaseCriteria,
    SignOff,
)

from .conftest import CLASSES, committed_for_module, detections_for, split_dict, upload

API = "/api/v1/"
USERS = ("lead", "engineer", "reviewer", "outsider", "rival")
STORED = (
    ModelVersion,
    PredictionSet,
    PredictionFile,
    Evaluation,
    BenchmarkSplit,
    ReleaseCriteria,
    SignOff,
    AuditEvent,
)


def _scene():
    """Team "Shuttle Perception" (lead, engineer, reviewer) with a detector and version
    1.4.0 scored on a split; team "Tram Vision" (rival, its lead) with version r1 scored
    too; outsider in no team. Every user has a token."""
    User = get_user_model()
    user = {name: User.objects.create_user(name) for name in USERS}
    team = services.create_team(
        "Shuttle Perception",
        [(user["lead"], "lead"), (user["engineer"], "engineer"), (user["reviewer"], "reviewer")],
    )
    detector = services.create_detector(team, "Forward camera", CLASSES, protocols=("coco", "voc"))
    rival_team = services.create_team("Tram Vision", [(user["rival"], "lead")])
    rival_detector = services.create_detector(rival_team, "Tram front", CLASSES)
    truth = split_dict()
    split = evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", truth)
    )
    # Each upload is scored, then judged, when it commits (the tasks run in-process).
    version = services.create_version(detector, "1.4.0", user["engineer"])
    services.submit_predictions(
        version, split, upload("p.json", detections_for(truth)), user["engineer"]
    )
    rival_version = services.create_version(rival_detector, "r1", user["rival"])
    services.submit_predictions(
        rival_version, split, upload("r.json", detections_for(truth, seed=8)), user["rival"]
    )
    assert set(Evaluation.objects.values_list("state", flat=True)) == {"done"}
    return types.SimpleNamespace(
        user=user,
        token={name: tokens.create_token(user[name], "tests")[1] for name in USERS},
        detector=detector.pk,
        split=split.pk,
        version=version.pk,
        split_truth=truth,
    )


@pytest.fixture(scope="module")
def scene(django_db_setup, django_db_blocker, tmp_path_factory):
    """The scene, committed once for the module (``conftest.committed_for_module``);
    each test's own writes are rolled back by ``db``."""
    for built, media in committed_for_module(django_db_blocker, tmp_path_factory, _scene):
        yield types.SimpleNamespace(**vars(built), media=media)


@pytest.fixture(autouse=True)
def _each(scene, db, settings):
    """A transaction per test, on the scene's files (tests/conftest.py gives every test
    an empty MEDIA_ROOT)."""
    settings.MEDIA_ROOT = scene.media
    settings.BENCHBOOK_ENGINE_CACHE = scene.media + "/engine-cache"


def client_for(scene, name):
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"Bearer {scene.token[name]}")
    return client


def _file(name, content):
    return SimpleUploadedFile(name, json.dumps(content).encode())


def _counts():
    return {model.__name__: model.objects.count() for model in STORED}


# Actions: (client, scene) -> response ------------------------------------------------

ACTIONS = {
    "read detector": lambda c, s: c.get(f"{API}detectors/{s.detector}/"),
    "list versions": lambda c, s: c.get(f"{API}versions/"),
    "read version": lambda c, s: c.get(f"{API}versions/{s.version}/"),
    "read verdict": lambda c, s: c.get(f"{API}versions/{s.version}/verdict/"),
    "read results": lambda c, s: c.get(f"{API}versions/{s.version}/results/"),
    "read evidence": lambda c, s: c.get(f"{API}versions/{s.version}/evidence/"),
    "list evaluations": lambda c, s: c.get(f"{API}evaluations/"),
    "list audit events": lambda c, s: c.get(f"{API}audit-events/"),
    "read split": lambda c, s: c.get(f"{API}splits/{s.split}/"),
    "create version": lambda c, s: c.post(
        f"{API}versions/", {"detector": s.detector, "label": "2.0"}, format="json"
    ),
    "upload predictions": lambda c, s: c.post(
        f"{API}prediction-sets/",
        {
            "detector": s.detector,
            "version": "2.0",
            "split": s.split,
            "predictions": _file("p2.json", detections_for(s.split_truth, seed=9)),
        },
        format="multipart",
    ),
    "load split": lambda c, s: c.post(
        f"{API}splits/",
        {"name": "ring-road", "revision": 1, "truth": _file("ring.json", split_dict(seed=9))},
        format="multipart",
    ),
    "set criteria": lambda c, s: c.post(
        f"{API}detectors/{s.detector}/criteria/",
        {"rules": [{"metric": "AP", "class": "mean", "kind": "min_value", "threshold": 0.1}]},
        format="json",
    ),
    "sign off": lambda c, s: c.post(
        f"{API}versions/{s.version}/sign-off/",
        {"decision": "approved", "comment": "scores hold"},
        format="json",
    ),
}

# Statuses, for:         lead engineer reviewer outsider rival
MATRIX = {
    "read detector":      (200, 200, 200, 404, 404),
    "list versions":      (200, 200, 200, 200, 200),
    "read version":       (200, 200, 200, 404, 404),
    "read verdict":       (200, 200, 200, 404, 404),
    "read results":       (200, 200, 200, 404, 404),
    "read evidence":      (200, 200, 200, 404, 404),
    "list evaluations":   (200, 200, 200, 200, 200),
    "list audit events":  (200, 200, 200, 200, 200),
    "read split":         (200, 200, 200, 200, 200),
    "create version":     (201, 201, 403, 404, 404),
    "upload predictions": (201, 201, 403, 404, 404),
    "load split":         (201, 201, 403, 403, 201),
    "set criteria":       (201, 403, 403, 404, 404),
    "sign off":           (201, 403, 403, 404, 404),
}  # fmt: skip

# What a list shows each user (its count). Versions: 1.4.0 and r1. Evaluations: 1.4.0
# under coco and voc, r1 under coco. Audit events: the split frozen, each detector's
# suite v1, each upload, each finished evaluation, each judgement; the outsider sees the
# split's event only.
SEEN = {
    "list versions":     (1, 1, 2, 0, 1),
    "list evaluations":  (2, 2, 3, 0, 1),
    "list audit events": (6, 6, 10, 1, 5),
}  # fmt: skip

# The rows a successful write adds.
ADDED = {
    "create version": {"ModelVersion": 1},
    "upload predictions": {"ModelVersion": 1, "PredictionSet": 1, "PredictionFile": 1},
    "load split": {"BenchmarkSplit": 1},
    "set criteria": {"ReleaseCriteria": 1},
    "sign off": {"SignOff": 1},
}


@pytest.mark.parametrize("user", USERS)
@pytest.mark.parametrize("action", MATRIX)
def test_role_and_action(scene, action, user):
    """The status of each action for each user; a refusal stores nothing."""
    expected = MATRIX[action][USERS.index(user)]
    before = _counts()
    response = ACTIONS[action](client_for(scene, user), scene)
    body = response.json()
    assert response.status_code == expected, body
    after = _counts()
    if expected >= 400:
        assert set(body) >= {"status", "code", "message", "errors"}, body
        assert body["status"] == expected and body["errors"], body
        assert after == before, "a refused request stored rows"
    elif action in ADDED:
        added = {k: after[k] - before[k] for k in after if after[k] != before[k]}
        assert {k: v for k, v in added.items() if k in ADDED[action]} == ADDED[action]
    else:
        assert after == before
    if action in SEEN:
        assert body["count"] == SEEN[action][USERS.index(user)], body
    if action == "list audit events" and user == "outsider":
        assert {e["subject"].split(":")[0] for e in body["results"]} == {"split"}


@pytest.mark.parametrize(
    ("user", "state", "expected"),
    [
        ("lead", "decided", 409),
        ("lead", "pending", 409),
        ("lead", "no predictions", 409),
        ("engineer", "pending", 403),  # the role is checked before the state
        ("reviewer", "decided", 403),
        ("rival", "pending", 404),
    ],
)
def test_sign_off_refused_by_state(scene, user, state, expected):
    """A lead's sign-off is refused (409) while scoring is pending, before any upload,
    or once decided; nothing is stored."""
    version = ModelVersion.objects.get(pk=scene.version)
    if state == "decided":
        services.sign_off(version, scene.user["lead"], "rejected", "not this one")
    else:  # a new version: its upload is not scored, the test's transaction never commits
        version = services.create_version(version.detector, "3.0", scene.user["engineer"])
        if state == "pending":
            services.submit_predictions(
                version,
                BenchmarkSplit.objects.get(pk=scene.split),
                upload("p3.json", detections_for(scene.split_truth, seed=10)),
                scene.user["engineer"],
            )
            assert version.prediction_sets.exists()
    before = _counts()
    response = client_for(scene, user).post(
        f"{API}versions/{version.pk}/sign-off/",
        {"decision": "approved", "comment": "ship it"},
        format="json",
    )
    body = response.json()
    assert response.status_code == expected, body
    assert set(body) >= {"status", "code", "message", "errors"} and body["status"] == expected
    assert _counts() == before
