"""Refused uploads (issue 12 item 8): an oversized page upload is refused from its
Content-Length before the body is read (no temporary file, a 413 page with the site's
navigation and the limit in words), and no refusal leaves a file anywhere under
MEDIA_ROOT or in the temporary directory."""

import json
import pathlib
import tempfile

import pytest
from django.conf import settings as django_settings
from django.test import Client
from django.urls import reverse

from evaluation.models import BenchmarkSplit, PredictionFile
from releases import services
from releases.models import PredictionSet

from .conftest import detections_for, split_dict, upload
from .test_api import API, client_for, file

pytestmark = pytest.mark.django_db


class Unreadable:
    """A WSGI input that fails the test if anything reads it."""

    def read(self, *args):
        raise AssertionError("the request body was read")

    readline = read

    def __iter__(self):
        raise AssertionError("the request body was read")


def _listing(root):
    root = pathlib.Path(root)
    return sorted(
        str(p.relative_to(root))
        for p in root.rglob("*")
        if "engine-cache" not in p.parts  # the parse cache lives here only in tests
    )


@pytest.fixture
def temp_dir(tmp_path, monkeypatch, settings):
    """Uploads spooled by Django (every one, however small) and by the services go to
    this directory."""
    folder = tmp_path / "temp"
    folder.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(folder))
    settings.FILE_UPLOAD_TEMP_DIR = str(folder)
    settings.FILE_UPLOAD_MAX_MEMORY_SIZE = 0
    return folder


def _huge_request(client, path):
    """A multipart POST that declares 600 MB and fails if read."""
    return client.generic(
        "POST",
        path,
        b"x",  # replaced below: only the declared length and the unreadable input count
        content_type="multipart/form-data; boundary=BoUnDaRy",
        CONTENT_LENGTH=str(600 * 1024 * 1024),
        **{"wsgi.input": Unreadable()},
    )


@pytest.mark.parametrize("page", ["upload", "load-split"])
@pytest.mark.parametrize("csrf", [False, True], ids=["test-client", "csrf-enforced"])
def test_an_oversized_page_upload_is_refused_unread(
    page, csrf, detector, users, temp_dir, settings
):
    """The CSRF check would parse the form, so the refusal must come before it too."""
    settings.BENCHBOOK_MAX_UPLOAD_BYTES = 1024 * 1024
    client = Client(enforce_csrf_checks=csrf)
    client.force_login(users["engineer"])
    path = reverse("upload", args=[detector.pk]) if page == "upload" else reverse(page)
    media = _listing(django_settings.MEDIA_ROOT)
    response = _huge_request(client, path)
    assert response.status_code == 413
    assert response["Connection"] == "close"
    text = response.content.decode()
    assert "Upload too large" in text
    assert "the upload limit is 1.0 MB (1,048,576 bytes) per file" in text
    assert "600.0 MB" in text
    assert 'aria-label="Main"' in text and "Sign out engineer" in text  # the navigation
    assert list(temp_dir.iterdir()) == []
    assert _listing(django_settings.MEDIA_ROOT) == media


def test_an_oversized_api_upload_is_refused_unread_with_a_session_too(
    detector, users, temp_dir, settings
):
    """DRF's session authentication runs Django's CSRF check, which reads the form."""
    settings.BENCHBOOK_MAX_UPLOAD_BYTES = 1024 * 1024
    for client in (Client(enforce_csrf_checks=True), client_for(users["engineer"])):
        client.force_login(users["engineer"])
        response = _huge_request(client, API + "prediction-sets/")
        assert response.status_code == 413
        body = response.json()
        assert body["code"] == "too_large" and "the upload limit is 1.0 MB" in body["message"]
    assert list(temp_dir.iterdir()) == []


def test_a_request_within_the_limit_is_still_read(client, detector, split, split_truth, users):
    client.force_login(users["engineer"])
    response = client.post(
        reverse("upload", args=[detector.pk]),
        {
            "version": "2.0",
            "split": split.pk,
            "predictions": upload("p.json", detections_for(split_truth)),
        },
    )
    assert response.status_code == 302


# Every refusal path leaves MEDIA_ROOT and the temporary directory as they were -------


def _predictions_page(client, detector, split, name, content, version="2.0"):
    return client.post(
        reverse("upload", args=[detector.pk]),
        {"version": version, "split": split, "predictions": upload(name, content)},
    )


def _predictions_api(user, detector, split, name, content, version="2.0"):
    return client_for(user).post(
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": version,
            "split": split,
            "predictions": file(name, content),
        },
        format="multipart",
    )


REFUSALS = ["too large", "empty", "bad content", "wrong role", "taken slot", "unknown split"]


@pytest.mark.parametrize("via", ["page", "api"])
@pytest.mark.parametrize("refusal", REFUSALS)
def test_a_refused_prediction_upload_leaves_no_file(
    via, refusal, client, detector, split, split_truth, users, run_tasks, temp_dir, settings
):
    good = json.dumps(detections_for(split_truth))
    run_tasks(  # version 1.0 holds scored predictions on the split
        services.submit_for_label,
        detector,
        "1.0",
        split,
        upload("held.json", good),
        users["engineer"],
    )
    settings.BENCHBOOK_MAX_UPLOAD_BYTES = len(good) + 10
    user, name, content, version, split_id = users["engineer"], "p.json", good, "2.0", split.pk
    if refusal == "too large":  # over the file limit, under the request's envelope
        content = good + " " * 100
    elif refusal == "empty":
        content = ""
    elif refusal == "bad content":
        content = good.replace('"image_id": ', '"image_id": 9', 1)  # not in the split
    elif refusal == "wrong role":
        user = users["reviewer"]
    elif refusal == "taken slot":  # other predictions for a version already scored
        version, content = "1.0", json.dumps(detections_for(split_truth, seed=9))
    elif refusal == "unknown split":
        split_id = 999999
    media, files, sets = _listing(django_settings.MEDIA_ROOT), PredictionFile.objects.count(), 1
    if via == "page":
        client.force_login(user)
        response = _predictions_page(client, detector, split_id, name, content, version)
    else:
        response = _predictions_api(user, detector, split_id, name, content, version)
    assert response.status_code in (400, 403, 409), response.content
    assert _listing(django_settings.MEDIA_ROOT) == media
    assert list(temp_dir.iterdir()) == []
    assert PredictionFile.objects.count() == files
    assert PredictionSet.objects.count() == sets


SPLIT_REFUSALS = [
    "too large",
    "empty",
    "bad content",
    "wrong role",
    "duplicate label",
    "duplicate content",
]


@pytest.mark.parametrize("via", ["page", "api"])
@pytest.mark.parametrize("refusal", SPLIT_REFUSALS)
def test_a_refused_split_load_leaves_no_file(
    via, refusal, client, split, users, temp_dir, settings
):
    truth = json.dumps(split_dict(seed=11))
    settings.BENCHBOOK_MAX_UPLOAD_BYTES = len(truth) + 10
    user, name, revision = users["engineer"], "ring-road", 1
    if refusal == "too large":
        truth = truth + " " * 100
    elif refusal == "empty":
        truth = ""
    elif refusal == "bad content":
        truth = truth[:-5]
    elif refusal == "wrong role":
        user = users["reviewer"]
    elif refusal == "duplicate label":  # the name and revision of the frozen fixture split
        name = "bay-night"
    elif refusal == "duplicate content":
        truth = split.truth_file.open("rb").read().decode()
        settings.BENCHBOOK_MAX_UPLOAD_BYTES = len(truth) + 10
    media, splits = _listing(django_settings.MEDIA_ROOT), BenchmarkSplit.objects.count()
    fields = {"name": name, "revision": revision, "description": ""}
    if via == "page":
        client.force_login(user)
        response = client.post(
            reverse("load-split"), {**fields, "truth": upload("truth.json", truth)}
        )
    else:
        response = client_for(user).post(
            API + "splits/", {**fields, "truth": file("truth.json", truth)}, format="multipart"
        )
    assert response.status_code in (400, 403, 409), response.content
    assert _listing(django_settings.MEDIA_ROOT) == media
    assert list(temp_dir.iterdir()) == []
    assert BenchmarkSplit.objects.count() == splits
