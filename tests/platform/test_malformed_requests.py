"""Malformed requests get 400 or 413 with the usual error body, never a 500.

The issue's five requests (an outside abuse test answered each with 500): 1,001 form
fields, 101 files, JSON nested 100,000 deep, an 11 MB JSON body to a JSON endpoint, a
split upload with an id of 2^63. Django's own limits are the references:
``DATA_UPLOAD_MAX_NUMBER_FIELDS`` (1,000), ``DATA_UPLOAD_MAX_NUMBER_FILES`` (100) and
``DATA_UPLOAD_MAX_MEMORY_SIZE`` (here 10 MiB); Django answers a page request over them
with 400 (its docs, "Settings"); RFC 9110 §15.5.14 names 413 for content too large."""

import json

import pytest
from django.test import Client
from django.test.client import encode_multipart

from evaluation.models import BenchmarkSplit, PredictionFile
from releases import tokens
from releases.models import ModelVersion

from .conftest import split_dict

pytestmark = pytest.mark.django_db

API = "/api/v1/"
BOUNDARY = "larkspur-boundary"
MULTIPART = f"multipart/form-data; boundary={BOUNDARY}"


@pytest.fixture
def api(users, team):
    _, token = tokens.create_token(users["engineer"], "tests")
    return Client(HTTP_AUTHORIZATION=f"Bearer {token}", raise_request_exception=False)


@pytest.fixture
def page(users, team):
    client = Client(raise_request_exception=False)
    client.force_login(users["engineer"])
    return client


def _error(response, status):
    assert response.status_code == status, response.content[:500]
    body = response.json()
    assert body["status"] == status and body["message"] and body["errors"], body
    return body


def _many_fields(n):
    return encode_multipart(BOUNDARY, {f"field{i}": "x" for i in range(n)})


def _many_files(n):
    from django.core.files.uploadedfile import SimpleUploadedFile

    files = {f"file{i}": SimpleUploadedFile(f"f{i}.json", b"[]") for i in range(n)}
    return encode_multipart(BOUNDARY, files)


def _deep_json(depth):
    return "[" * depth + "]" * depth


@pytest.mark.parametrize("path", ["prediction-sets/", "splits/", "versions/{version}/sign-off/"])
def test_1001_form_fields_answer_400(api, path, version):
    response = api.post(
        API + path.format(version=version.pk), _many_fields(1001), content_type=MULTIPART
    )
    body = _error(response, 400)
    assert "too many fields" in body["message"]


def test_1001_urlencoded_fields_answer_400(api, version):
    body = "&".join(f"f{i}=x" for i in range(1001))
    response = api.post(
        API + f"versions/{version.pk}/sign-off/",
        body,
        content_type="application/x-www-form-urlencoded",
    )
    assert "too many fields" in _error(response, 400)["message"]


@pytest.mark.parametrize("path", ["prediction-sets/", "splits/"])
def test_101_files_answer_400(api, path):
    response = api.post(API + path, _many_files(101), content_type=MULTIPART)
    assert "too many files" in _error(response, 400)["message"]
    assert not PredictionFile.objects.exists() and not BenchmarkSplit.objects.exists()


@pytest.mark.parametrize(
    "path",
    ["versions/{version}/sign-off/", "detectors/{detector}/criteria/"],
)
def test_json_nested_100000_deep_answers_400(api, path, version):
    response = api.post(
        API + path.format(version=version.pk, detector=version.detector_id),
        _deep_json(100_000),
        content_type="application/json",
    )
    assert "nested too deeply" in _error(response, 400)["message"]


def test_an_11_mb_json_body_answers_413(api, version):
    body = json.dumps({"decision": "approved", "comment": "x" * (11 * 1024 * 1024)})
    response = api.post(
        API + f"versions/{version.pk}/sign-off/", body, content_type="application/json"
    )
    assert "larger than" in _error(response, 413)["message"]


def test_an_11_mb_form_body_answers_413(api, version):
    body = "comment=" + "x" * (11 * 1024 * 1024)
    response = api.post(
        API + f"versions/{version.pk}/sign-off/",
        body,
        content_type="application/x-www-form-urlencoded",
    )
    _error(response, 413)


def test_invalid_utf8_json_answers_400(api, version):
    response = api.post(
        API + f"versions/{version.pk}/sign-off/",
        b'{"comment": "\xff"}',
        content_type="application/json",
    )
    _error(response, 400)


@pytest.mark.parametrize("big", [2**63, 2**64, -(2**63) - 1, 10**30])
def test_a_split_with_a_huge_id_is_accepted(api, big):
    """Ids beyond signed 64 bits are read as pycocotools reads them (Python ints; the
    pages route images by their index in the split, never by id): the split is stored.
    Its scoring, pages and downloads: test_any_ids.py."""
    from django.core.files.uploadedfile import SimpleUploadedFile

    truth = split_dict()
    truth["images"][0]["id"] = big
    for annotation in truth["annotations"]:
        if annotation["image_id"] == split_dict()["images"][0]["id"]:
            annotation["image_id"] = big
    data = {
        "name": "bay-night",
        "revision": 1,
        "truth": SimpleUploadedFile("truth.json", json.dumps(truth).encode()),
    }
    response = api.post(API + "splits/", data)
    assert response.status_code == 201, response.json()
    assert BenchmarkSplit.objects.get().image_count == len(truth["images"])


# Pages ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "body, content_type",
    [
        (_many_fields(1001), MULTIPART),
        ("&".join(f"f{i}=x" for i in range(1001)), "application/x-www-form-urlencoded"),
        (_many_files(101), MULTIPART),
    ],
)
def test_pages_answer_400_with_the_error_page(page, detector, body, content_type):
    for path in (f"/detectors/{detector.pk}/upload/", "/splits/load/"):
        response = page.post(path, body, content_type=content_type)
        assert response.status_code == 400, (path, response.status_code)
        assert b"Bad request" in response.content
    assert not ModelVersion.objects.exists()


def test_a_page_with_an_11_mb_form_answers_413(page, version):
    body = "comment=" + "x" * (11 * 1024 * 1024)
    response = page.post(
        f"/versions/{version.pk}/sign-off/", body, content_type="application/x-www-form-urlencoded"
    )
    assert response.status_code == 413
    assert b"too large" in response.content


def test_the_criteria_page_refuses_rules_nested_too_deeply(users, team, detector):
    """The criteria page decodes the rules text itself; a deep document is a form error."""
    client = Client(raise_request_exception=False)
    client.force_login(users["lead"])
    response = client.post(f"/detectors/{detector.pk}/criteria/", {"rules": _deep_json(100_000)})
    assert response.status_code == 400
    assert "rules: not valid JSON: nested too deeply" in response.content.decode()


def test_a_request_django_refuses_outside_the_api_views_gets_the_api_body(api, settings):
    """A page-level refusal of an /api/ path (Django's handler400) still answers JSON."""
    from django.core.exceptions import TooManyFieldsSent
    from django.test import RequestFactory

    from frontend.errors import bad_request

    request = RequestFactory().post("/api/v1/prediction-sets/")
    response = bad_request(request, TooManyFieldsSent("x"))
    assert response.status_code == 400
    assert json.loads(response.content)["code"] == "too_many_fields"
