"""One results set through each upload entry point: the upload page, the API and the
``upload_predictions`` command, as versions 1.0, 2.0 and 3.0 of a detector; past the
inline size, as version 4.0; a refused one through the API, as version 5.0."""

import json

from django.core.management import call_command
from django.urls import reverse

from .conftest import upload
from .test_api import API, client_for, file


def upload_by_page_api_and_command(client, run_tasks, users, detector, split, sets, tmp_path):
    """``sets[0]`` by the page, ``sets[1]`` by the API, ``sets[2]`` by the command,
    each scored by ``run_tasks``; the three versions' labels."""
    client.force_login(users["engineer"])
    response = run_tasks(
        client.post,
        reverse("upload", args=[detector.pk]),
        {"version": "1.0", "split": split.pk, "predictions": upload("page.json", sets[0])},
    )
    assert response.status_code in (200, 302), response.content.decode()
    response = run_tasks(
        client_for(users["engineer"]).post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("api.json", sets[1]),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    path = tmp_path / "third.json"
    path.write_text(json.dumps(sets[2]))
    run_tasks(
        call_command,
        "upload_predictions",
        "--detector", detector.slug, "--label", "3.0",
        "--split", f"{split.name}:{split.revision}",
        "--user", "engineer", "--create-version", str(path),
    )  # fmt: skip
    return ("1.0", "2.0", "3.0")


def coco_evaluation(version):
    """The ``coco`` evaluation of a version's prediction set."""
    from evaluation.models import Evaluation

    return Evaluation.objects.get(prediction_sets__version=version, protocol="coco")


def every_path_as_pycocotools(
    client, run_tasks, users, detector, split, truth, sets, tmp_path, check_card
):
    """``sets`` through the page, the API and the command
    (``upload_by_page_api_and_command``); each version's ``coco`` scorecard must equal
    pycocotools 2.0.11 on the same files (``test_any_ids._assert_pycocotools_numbers``),
    then ``check_card(card)`` runs on it."""
    from .test_any_ids import _assert_pycocotools_numbers

    labels = upload_by_page_api_and_command(
        client, run_tasks, users, detector, split, sets, tmp_path
    )
    for label, dets in zip(labels, sets):
        version = detector.versions.get(label=label)
        card = _assert_pycocotools_numbers(coco_evaluation(version), truth, dets, tmp_path)
        check_card(card)


def refused_by_api(users, detector, split, dets):
    """``dets`` posted to the API as ``bad.json`` (version 5.0): answered 400; the
    answer as JSON text, for the caller to check what it names."""
    response = client_for(users["engineer"]).post(
        API + "prediction-sets/",
        {"detector": detector.pk, "version": "5.0", "split": split.pk,
         "predictions": file("bad.json", dets)},
        format="multipart",
    )  # fmt: skip
    assert response.status_code == 400
    return json.dumps(response.json())


def upload_sharded(run_tasks, settings, monkeypatch, users, detector, split, dets, label="4.0"):
    """``dets`` uploaded as version ``label`` past the inline size: streamed into pieces
    and scored in shards of 3 images and class groups (each send run by ``run_tasks``);
    the version."""
    from evaluation import class_groups, sharding
    from releases import services

    from .test_shards import GROUP_SENDS, _run

    sends = []
    GROUP_SENDS.clear()
    monkeypatch.setattr(sharding, "send", lambda *args: sends.append(args))
    monkeypatch.setattr(class_groups, "send", lambda *args: GROUP_SENDS.append(args))
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 1
    settings.BENCHBOOK_SHARD_ABOVE = 0
    settings.BENCHBOOK_SHARD_IMAGES = 3
    version = services.create_version(detector, label, users["engineer"])
    run_tasks(
        services.submit_predictions, version, split, upload("big.json", dets), users["engineer"]
    )
    assert sends
    _run(run_tasks, sends)
    return version
