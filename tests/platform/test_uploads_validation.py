"""Structural validation inside the upload request (issue 10 item 6): a predictions
file up to BENCHBOOK_INLINE_VALIDATION_BYTES is loaded against the split before it is
accepted; the page and the API answer 400 naming file, record and field, and nothing is
stored. Larger files are accepted and checked by the worker."""

import json
import pathlib

import pytest
from django.conf import settings as django_settings
from django.urls import reverse

from evaluation.models import Evaluation, PredictionFile
from releases.models import AuditEvent, ModelVersion, PredictionSet

from .conftest import detections_for, upload
from .test_api import API, client_for, file

pytestmark = pytest.mark.django_db

# The required fields and their types are those of the COCO results format
# (cocodataset.org "Results Format": image_id, category_id, bbox [x, y, w, h], score;
# common practice); ids must be the split's images and categories, as pycocotools'
# loadRes asserts for image ids.
CASES = [
    (
        "malformed.json",
        lambda ok: '[{"image_id": 1, "category_id": 1 "bbox": [1, 2, 3, 4]}]',
        "malformed.json: not valid JSON: expected ',' or '}' at line 1, column 35",
        {},
    ),
    (
        "unknown-image.json",
        lambda ok: json.dumps(ok + [{**ok[0], "image_id": 99999}]),
        "unknown-image.json: record {n}: field 'image_id': image 99999 is not in the split",
        {"field": "image_id"},
    ),
    (  # ids of any size are read (pycocotools keeps Python ints); named as written
        "huge-id.json",
        lambda ok: json.dumps(ok + [{**ok[0], "image_id": 2**64 + 5}]),
        "huge-id.json: record {n}: field 'image_id': image 18446744073709551621 is not in "
        "the split",
        {"field": "image_id"},
    ),
    (
        "no-score.json",
        lambda ok: json.dumps(ok + [{k: v for k, v in ok[0].items() if k != "score"}]),
        "no-score.json: record {n}: field 'score'",
        {"field": "score"},
    ),
    (  # Python's json (pycocotools' reader) stops near its recursion limit too
        "deep.json",
        lambda ok: json.dumps(ok).replace(
            '"score"', '"x": ' + "[" * 3000 + "]" * 3000 + ', "score"', 1
        ),
        "deep.json: not valid JSON: nested deeper than 1000 levels",
        {},
    ),
    (
        "wrong-columns.csv",
        lambda ok: "frame,what\n1,car\n",
        "wrong-columns.csv: line 1: field 'image_id': missing column(s) image_id",
        {"field": "image_id"},
    ),
]


def _stored():
    """Rows an upload creates, and the files under MEDIA_ROOT (the engine's parse cache,
    kept under MEDIA_ROOT only in tests, is a cache and not counted)."""
    root = pathlib.Path(django_settings.MEDIA_ROOT)
    files = sorted(
        str(p.relative_to(root))
        for p in root.rglob("*")
        if p.is_file() and "engine-cache" not in p.parts
    )
    return {
        "files": PredictionFile.objects.count(),
        "sets": PredictionSet.objects.count(),
        "evaluations": Evaluation.objects.count(),
        "versions": ModelVersion.objects.count(),
        "events": AuditEvent.objects.count(),
        "media": files,
    }


@pytest.mark.parametrize("name, content, message, located", CASES)
def test_the_api_refuses_a_bad_small_file_with_file_record_and_field(
    detector, split, split_truth, users, name, content, message, located
):
    ok = detections_for(split_truth)
    before = _stored()
    response = client_for(users["engineer"]).post(
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file(name, content(ok)),
        },
        format="multipart",
    )
    body = response.json()
    assert response.status_code == 400, body
    assert body["code"] == "invalid_file"
    assert body["message"].startswith("predictions: " + message.replace("{n}", str(len(ok))))
    assert body["file"] == name
    for key, value in located.items():
        assert body[key] == value, body
    if "field" in located:
        assert body["record"] is not None
    assert _stored() == before


@pytest.mark.parametrize("name, content, message, located", CASES)
def test_the_page_refuses_a_bad_small_file_in_place(
    client, detector, split, split_truth, users, name, content, message, located
):
    ok = detections_for(split_truth)
    client.force_login(users["engineer"])
    before = _stored()
    response = client.post(
        reverse("upload", args=[detector.pk]),
        {"version": "2.0", "split": split.pk, "predictions": upload(name, content(ok))},
    )
    assert response.status_code == 400
    page = response.content.decode()
    expected = message.replace("{n}", str(len(ok))).replace("'", "&#x27;")
    assert expected in page
    assert "stored; scoring is queued" not in page
    assert _stored() == before


def test_a_file_over_the_inline_limit_is_accepted_and_checked_by_the_worker(
    detector, split, split_truth, users, run_tasks, settings
):
    ok = detections_for(split_truth)
    text = json.dumps(ok + [{**ok[0], "image_id": 99999}])
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = len(text.encode()) - 1
    response = run_tasks(
        client_for(users["engineer"]).post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("big.json", text),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    evaluations = Evaluation.objects.filter(predictions__sha256=response.json()["sha256"])
    assert {e.state for e in evaluations} == {"failed"}
    assert all("image 99999 is not in the split" in e.error for e in evaluations)


def test_a_good_small_file_is_accepted(detector, split, split_truth, users, run_tasks):
    response = run_tasks(
        client_for(users["engineer"]).post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("good.json", detections_for(split_truth)),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    assert set(
        Evaluation.objects.filter(predictions__sha256=response.json()["sha256"]).values_list(
            "state", flat=True
        )
    ) == {"done"}


def test_the_limit_is_documented():
    """README and DEVELOPERS.md name the setting and its default."""
    root = pathlib.Path(__file__).resolve().parents[2]
    for doc in ("README.md", "DEVELOPERS.md"):
        text = (root / doc).read_text()
        assert "BENCHBOOK_INLINE_VALIDATION_BYTES" in text and "16 MiB" in text, doc


def test_the_command_refuses_a_bad_small_file_with_its_message(
    detector, split, split_truth, users, tmp_path
):
    from django.core.management import CommandError, call_command

    path = tmp_path / "unknown-image.json"
    ok = detections_for(split_truth)
    path.write_text(json.dumps(ok + [{**ok[0], "image_id": 99999}]))
    before = _stored()
    with pytest.raises(
        CommandError, match=f"unknown-image.json: record {len(ok)}: field 'image_id': image 99999"
    ):
        call_command(
            "upload_predictions",
            "--detector", detector.slug, "--label", "2.0", "--split", "bay-night:1",
            "--user", "engineer", "--create-version", str(path),
        )  # fmt: skip
    assert _stored() == before


def test_the_in_request_check_uses_the_suites_box_policy(
    client, detector, split, split_truth, users, tmp_path
):
    """Under a suite whose box policy is ``reject``, a small file with a box outside the
    frame is refused inside the request (page, API and command) with file, record and
    field, as the worker would refuse it; nothing is stored. Under ``keep`` (the
    reference tools' behaviour: pycocotools scores such boxes as given, common practice)
    the same file is accepted."""
    from django.core.management import CommandError, call_command

    from releases import suites
    from tests.platform.test_box_policy import _overhanging_file

    suites.set_suite(
        detector,
        users["lead"],
        {"splits": [{"name": split.name, "revision": None}], "box_policy": "reject"},
    )
    content = json.dumps(_overhanging_file(split_truth)).encode()
    before = _stored()
    response = client_for(users["engineer"]).post(
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("edge.json", content),
        },
        format="multipart",
    )
    body = response.json()
    assert response.status_code == 400, body
    assert body["message"].startswith("predictions: edge.json: record 0: field 'bbox'"), body
    assert "outside" in body["message"] or "frame" in body["message"], body
    assert (body["file"], body["record"], body["field"]) == ("edge.json", "record 0", "bbox")
    assert _stored() == before

    client.force_login(users["engineer"])
    page = client.post(
        reverse("upload", args=[detector.pk]),
        {"version": "2.0", "split": split.pk, "predictions": upload("edge.json", content)},
    )
    assert page.status_code == 400
    assert "edge.json: record 0: field &#x27;bbox&#x27;" in page.content.decode()
    assert _stored() == before

    path = tmp_path / "edge.json"
    path.write_bytes(content)
    with pytest.raises(CommandError, match="edge.json: record 0: field 'bbox'"):
        call_command(
            "upload_predictions",
            "--detector", detector.slug, "--label", "2.0", "--split", "bay-night:1",
            "--user", "engineer", "--create-version", str(path),
        )  # fmt: skip
    assert _stored() == before

    suites.set_suite(
        detector,
        users["lead"],
        {"splits": [{"name": split.name, "revision": None}], "box_policy": "keep"},
    )
    accepted = client_for(users["engineer"]).post(
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("edge.json", content),
        },
        format="multipart",
    )
    assert accepted.status_code == 201, accepted.json()
