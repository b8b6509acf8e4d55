"""Downloads of an evaluation's stored predictions file (issue 15, item 3): through one
function (``releases.downloads.predictions_response``) behind the page and the API,
with the records downloads' visibility (team membership; another team's evaluation is
a 404), never a public media URL; the body is the stored bytes, hash-checked first and
named by their SHA-256 in ``X-Content-SHA256`` and ``Repr-Digest`` (RFC 9530)."""

import base64
import hashlib
import json

import pytest
from django.urls import reverse
from rest_framework.test import APIClient

from evaluation.models import Evaluation
from releases import services, tokens
from releases.models import AuditEvent

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


@pytest.fixture
def sent(split_truth):
    """The exact bytes uploaded (spacing kept, so a re-serialisation would differ)."""
    return json.dumps(detections_for(split_truth), indent=1).encode()


@pytest.fixture
def evaluation(users, detector, split, sent, run_tasks):
    version = services.create_version(detector, "1.5", users["engineer"])
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", sent), users["engineer"]
    )
    return Evaluation.objects.get(protocol="coco")


def _body(response):
    return b"".join(response.streaming_content)


def _check(response, sent):
    assert response.status_code == 200
    assert _body(response) == sent
    digest = hashlib.sha256(sent).hexdigest()
    assert response["X-Content-SHA256"] == digest
    assert (
        response["Repr-Digest"] == f"sha-256=:{base64.b64encode(bytes.fromhex(digest)).decode()}:"
    )
    assert 'filename="p.json"' in response["Content-Disposition"]
    assert response["X-Content-Type-Options"] == "nosniff"


def test_page_download_for_members_only(client, users, evaluation, sent, rival_detector):
    url = reverse("predictions-download", args=[evaluation.pk])
    anonymous = client.get(url)
    assert anonymous.status_code == 302 and "/login/" in anonymous["Location"]
    for name in ("engineer", "lead", "reviewer"):
        client.force_login(users[name])
        _check(client.get(url), sent)
    for name in ("rival", "outsider"):
        client.force_login(users[name])
        assert client.get(url).status_code == 404
    client.force_login(users["engineer"])
    assert client.get(reverse("predictions-download", args=[10**12])).status_code == 404
    page = client.get(reverse("version", args=[evaluation.prediction_sets.get().version_id]))
    assert url in page.content.decode()


def test_api_download_with_a_token_and_refusals(users, evaluation, sent, rival_detector):
    url = f"/api/v1/evaluations/{evaluation.pk}/predictions"
    api = APIClient()
    assert api.get(url).status_code in (401, 403)
    _, token = tokens.create_token(users["engineer"], "ci")
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {token}")
    _check(api.get(url), sent)
    api.credentials()
    api.force_authenticate(users["rival"])
    refused = api.get(url)
    assert refused.status_code == 404 and refused.json()["status"] == 404
    schema = api.get("/api/schema/", {"format": "json"}).json()
    assert "/api/v1/evaluations/{id}/predictions" in schema["paths"]


def test_no_public_media_url(client, users, evaluation):
    """The stored file's media path answers nothing, signed in or not."""
    name = evaluation.predictions.file.name
    client.force_login(users["engineer"])
    assert client.get(f"/media/{name}").status_code == 404


def test_a_changed_stored_file_is_refused_and_audited(client, users, evaluation):
    stored = evaluation.predictions.file
    with open(stored.path, "ab") as f:
        f.write(b" ")
    client.force_login(users["engineer"])
    response = client.get(reverse("predictions-download", args=[evaluation.pk]))
    assert response.status_code == 409 and b"does not match" in response.content
    api = APIClient()
    api.force_authenticate(users["engineer"])
    refused = api.get(f"/api/v1/evaluations/{evaluation.pk}/predictions")
    assert refused.status_code == 409 and refused.json()["code"] == "content_mismatch"
    assert (
        AuditEvent.objects.filter(
            kind="content mismatch", subject=f"predictions:{evaluation.predictions_id}"
        ).count()
        == 2
    )
