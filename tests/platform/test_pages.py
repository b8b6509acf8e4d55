"""Web pages and management commands of the platform."""

import pytest
from django.core.management import call_command
from django.core.management.base import CommandError
from django.urls import reverse

from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit, Evaluation, PredictionFile
from releases import services
from releases.models import PredictionSet

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


def _login(client, user):
    client.force_login(user)
    return client


def test_pages_need_a_login(client, detector):
    for url in (reverse("overview"), reverse("splits"), reverse("detector", args=[detector.pk])):
        response = client.get(url)
        assert response.status_code == 302 and response.url.startswith(reverse("login"))


def test_members_see_their_detector_and_outsiders_get_404(client, users, detector, rival_detector):
    _login(client, users["engineer"])
    assert client.get(reverse("detector", args=[detector.pk])).status_code == 200
    assert client.get(reverse("detector", args=[rival_detector.pk])).status_code == 404
    assert "Tram front" not in client.get(reverse("overview")).content.decode()
    _login(client, users["outsider"])
    assert client.get(reverse("detector", args=[detector.pk])).status_code == 404
    assert client.get(reverse("upload", args=[detector.pk])).status_code == 404


def test_reviewers_read_every_team_but_cannot_upload(client, users, detector, rival_detector):
    _login(client, users["reviewer"])
    assert client.get(reverse("detector", args=[rival_detector.pk])).status_code == 200
    assert client.get(reverse("upload", args=[detector.pk])).status_code == 403


def test_upload_form_queues_scoring_and_shows_progress_json(
    client, users, detector, split, split_truth, run_tasks
):
    _login(client, users["engineer"])
    response = run_tasks(
        client.post,
        reverse("upload", args=[detector.pk]),
        {
            "version": "1.5.0",
            "split": split.pk,
            "predictions": upload("preds.json", detections_for(split_truth)),
        },
    )
    assert response.status_code == 302
    evaluation = Evaluation.objects.get(protocol="coco")
    status = client.get(reverse("evaluation-status", args=[evaluation.pk])).json()
    assert status == {
        "id": evaluation.pk,
        "state": "done",
        "progress": 100,
        "error": "",
        "error_detail": None,
    }
    version = Evaluation.objects.get(protocol="coco").predictions  # the stored file
    page = client.get(
        reverse("version", args=[PredictionSet.objects.get(predictions=version).version_id])
    )
    assert "1.5.0" in page.content.decode() and "state-done" in page.content.decode()
    _login(client, users["rival"])
    assert client.get(reverse("evaluation-status", args=[evaluation.pk])).status_code == 404


def test_upload_form_shows_the_error_in_place(client, users, detector, split):
    _login(client, users["engineer"])
    response = client.post(
        reverse("upload", args=[detector.pk]),
        {
            "version": "1.6.0",
            "split": split.pk,
            "predictions": upload("none.json", b"[]"),
        },
    )
    assert response.status_code == 302  # an empty list is valid: it scores zero
    response = client.post(
        reverse("upload", args=[detector.pk]),
        {
            "version": "1.6.0",
            "split": split.pk,
            "predictions": upload("other.json", b"[ ]"),
        },
    )
    assert response.status_code == 409
    assert (
        "1.6.0 already has predictions on bay-night rev 1 (none.json)" in response.content.decode()
    )
    assert PredictionSet.objects.filter(version__label="1.6.0").count() == 1


def test_failed_evaluation_message_is_shown(client, users, detector, split, run_tasks, settings):
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0  # checked by the worker
    _login(client, users["engineer"])
    run_tasks(
        client.post,
        reverse("upload", args=[detector.pk]),
        {
            "version": "1.5.0",
            "split": split.pk,
            "predictions": upload(
                "bad.json",
                '[{"image_id": 999999, "category_id": 1, "bbox": [1,2,3,4], "score": 0.5}]',
            ),
        },
    )
    version_id = PredictionSet.objects.get().version_id
    page = client.get(reverse("version", args=[version_id])).content.decode()
    assert (
        "bad.json: record 0: field &#x27;image_id&#x27;: image 999999 is not in the split" in page
    )


def test_load_split_form(client, users, team, split_truth):
    _login(client, users["engineer"])
    response = client.post(
        reverse("load-split"),
        {
            "name": "ring-road",
            "revision": 1,
            "truth": upload("ring.json", split_truth),
        },
    )
    assert response.status_code == 302
    assert BenchmarkSplit.objects.get().sha256
    bad = client.post(
        reverse("load-split"),
        {
            "name": "ring-road",
            "revision": 2,
            # no categories: nothing to score (pycocotools would evaluate no class), refused
            "truth": upload("bad.json", '{"images": [], "annotations": []}'),
        },
    )
    assert bad.status_code == 400
    assert "bad.json: field &#x27;categories&#x27;: missing required field" in bad.content.decode()
    assert BenchmarkSplit.objects.count() == 1


def test_outsiders_cannot_load_splits(client, users):
    _login(client, users["outsider"])
    assert client.get(reverse("load-split")).status_code == 403


def test_commands_load_and_upload(tmp_path, users, detector, split_truth, run_tasks, capsys):
    import json

    (tmp_path / "split.json").write_text(json.dumps(split_truth))
    call_command("load_split", "bay-day", "1", str(tmp_path / "split.json"))
    assert "frozen bay-day rev 1" in capsys.readouterr().out
    (tmp_path / "p.json").write_text(json.dumps(detections_for(split_truth)))
    run_tasks(
        call_command,
        "upload_predictions",
        str(tmp_path / "p.json"),
        detector="forward-camera",
        label="0.9",
        split="bay-day:1",
        user="engineer",
        create_version=True,
    )
    assert Evaluation.objects.filter(state="done").count() == 2
    with pytest.raises(CommandError, match="bay-day rev 1 already exists"):
        call_command("load_split", "bay-day", "1", str(tmp_path / "split.json"))
    with pytest.raises(CommandError, match="rival may not upload"):
        call_command(
            "upload_predictions",
            str(tmp_path / "p.json"),
            detector="forward-camera",
            label="0.9",
            split="bay-day:1",
            user="rival",
        )
    assert PredictionFile.objects.count() == 1


def test_admin_shows_frozen_and_finished_rows_read_only(
    admin_client, split, version, users, split_truth, run_tasks
):
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    evaluation = Evaluation.objects.filter(state="done").first()
    split_page = admin_client.get(
        reverse("admin:evaluation_benchmarksplit_change", args=[split.pk])
    )
    assert (
        split_page.status_code == 200
        and 'type="submit"' not in split_page.content.decode().split("<form")[-1]
    )
    assert (
        admin_client.post(
            reverse("admin:evaluation_benchmarksplit_delete", args=[split.pk]), {"post": "yes"}
        ).status_code
        == 403
    )
    done_page = admin_client.get(
        reverse("admin:evaluation_evaluation_change", args=[evaluation.pk])
    )
    assert done_page.status_code == 200 and "Save" not in done_page.content.decode()
    for model in ("team", "detector", "modelversion", "predictionset"):
        assert admin_client.get(reverse(f"admin:releases_{model}_changelist")).status_code == 200


def test_csv_split_with_images_table(users, team):
    split = evaluation_services.load_split(
        name="kerb-stops",
        revision=1,
        truth=upload(
            "boxes.csv",
            "image_id,label,x_min,y_min,x_max,y_max\nf1,car,10,10,90,60\nf2,pedestrian,5,5,25,70\n",
        ),
        images=upload(
            "images.csv", "image_id,width,height,tags\nf1,1280,720,night\nf2,1280,720,day;rain\n"
        ),
    )
    assert (split.image_count, split.box_count, split.source_format) == (2, 2, "csv")
    assert split.tags == {"day": 1, "night": 1, "rain": 1}
    assert split.class_counts == {"car": 1, "pedestrian": 1}
    assert split.images_file.name.endswith("images.csv")
