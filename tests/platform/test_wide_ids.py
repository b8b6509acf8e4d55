"""Ids outside signed 64 bits on the platform: refused at upload, naming file, record
and field, by every entry point (the engine's CLI scores them, as pycocotools does;
the platform keeps ``evaluation.services.ENGINE_IDS = "int64"``). The API's refusal of
such a split is in test_malformed_requests.py, of such predictions (API and page) in
test_uploads_validation.py; a file past the inline limit fails its evaluation with the
same message (test_jobs.py)."""

import json

import pytest
from django.core.management import CommandError, call_command
from django.urls import reverse

from evaluation.models import BenchmarkSplit

from .conftest import detections_for, split_dict, upload

pytestmark = pytest.mark.django_db

BIG = -(2**63) - 1
MESSAGE = "truth.json: images[0]: field 'id': -9223372036854775809 is outside the supported range"


def _huge_split():
    truth = split_dict()
    old = truth["images"][0]["id"]
    truth["images"][0]["id"] = BIG
    for annotation in truth["annotations"]:
        if annotation["image_id"] == old:
            annotation["image_id"] = BIG
    return truth


def test_the_command_refuses_a_split_with_a_huge_id(tmp_path):
    path = tmp_path / "truth.json"
    path.write_text(json.dumps(_huge_split()))
    with pytest.raises(CommandError, match=MESSAGE.replace("[", r"\[").replace("]", r"\]")):
        call_command("load_split", "bay-night", "1", str(path))
    assert not BenchmarkSplit.objects.exists()


def test_the_page_refuses_a_split_with_a_huge_id(client, users, team):
    client.force_login(users["engineer"])
    response = client.post(
        reverse("load-split"),
        {"name": "bay-night", "revision": 1, "truth": upload("truth.json", _huge_split())},
    )
    assert response.status_code == 400
    assert MESSAGE.replace("'", "&#x27;") in response.content.decode()
    assert not BenchmarkSplit.objects.exists()


def test_the_command_refuses_predictions_with_a_huge_id(
    detector, split, split_truth, users, tmp_path
):
    path = tmp_path / "huge.json"
    ok = detections_for(split_truth)
    path.write_text(json.dumps(ok + [{**ok[0], "category_id": 2**63}]))
    with pytest.raises(
        CommandError,
        match=rf"huge.json: record {len(ok)}: field 'category_id': 9223372036854775808 is outside",
    ):
        call_command(
            "upload_predictions",
            "--detector", detector.slug, "--label", "2.0", "--split", "bay-night:1",
            "--user", "engineer", "--create-version", str(path),
        )  # fmt: skip
