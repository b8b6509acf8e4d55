"""Splits and predictions as zips of KITTI / YOLO / VOC label files through the
platform: ``services.load_split`` and ``_load_predictions`` (the one place each
guarantee lives) reached from the API, the page and the management command. A zip is
recognised by its content; its split has the content hash of the same split as COCO
JSON; a hostile zip is refused naming the archive and the member, storing nothing.
(Layouts: the KITTI object devkit's readme, the YOLO label layout, the VOC devkit.)"""

import io
import json
import pathlib
import zipfile

import pytest
from django.conf import settings as django_settings
from django.core.management import call_command
from django.urls import reverse

from evaluation import engine
from evaluation.models import BenchmarkSplit, Evaluation
from evaluation.services import load_truth_of

from ..engine import label_writers as write
from .test_api import API, client_for, file

pytestmark = pytest.mark.django_db

IMAGES = {1: (1024, 512), 2: (1024, 512), 3: (512, 256)}
CLASSES = ["Car", "Cyclist", "Pedestrian"]
BOXES = [
    (1, "Car", [100.0, 200.0, 150.0, 80.0], {"occlusion": 0, "truncation": 0.0}),
    (1, "Pedestrian", [700.0, 150.0, 30.0, 90.0], {"occlusion": 1, "truncation": 0.1}),
    (2, "Cyclist", [20.0, 40.0, 50.0, 100.0], {"occlusion": 2, "truncation": 0.4}),
    (3, "Car", [60.0, 30.0, 200.0, 120.0], {"occlusion": 0, "truncation": 0.0}),
]
REGIONS = [(2, [600.0, 0.0, 200.0, 100.0])]
DETECTIONS = [
    (1, "Car", [102.0, 198.0, 150.0, 82.0], 0.9),
    (1, "Pedestrian", [701.0, 152.0, 28.0, 88.0], 0.8),
    (2, "Car", [650.0, 10.0, 100.0, 60.0], 0.7),
    (3, "Car", [62.0, 31.0, 198.0, 118.0], 0.6),
]


def _zip_bytes(folder):
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as z:
        for path in sorted(pathlib.Path(folder).rglob("*")):
            if path.is_file():
                z.write(path, path.relative_to(folder).as_posix())
    return buffer.getvalue()


@pytest.fixture
def archives(tmp_path):
    kitti = write.kitti(tmp_path / "k", IMAGES, CLASSES, BOXES, REGIONS)
    dets = write.kitti(tmp_path / "kd", IMAGES, CLASSES, BOXES, detections=DETECTIONS)
    same = write.coco(tmp_path / "same.json", IMAGES, CLASSES, BOXES, REGIONS)
    data = json.loads(same.read_text())
    for image in data["images"]:  # the zip holds no images table nor image files
        del image["width"], image["height"]
    same.write_text(json.dumps(data))
    reference = engine.load_truth(same)
    return {"truth": _zip_bytes(kitti), "predictions": _zip_bytes(dets), "reference": reference}


def test_a_kitti_zip_loads_through_the_api_with_the_json_hash(users, team, archives):
    response = client_for(users["engineer"]).post(
        API + "splits/",
        {"name": "ring-road", "revision": 1, "truth": file("labels.zip", archives["truth"])},
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    split = BenchmarkSplit.objects.get(name="ring-road")
    assert split.sha256 == archives["reference"].content_hash() == response.json()["sha256"]
    assert split.source_format == "kitti" and split.box_count == 4
    truth = load_truth_of(split)  # read back from storage, hash checked
    assert truth.regions.tolist() == [[600.0, 0.0, 200.0, 100.0]]


def test_zip_predictions_are_scored_like_json(
    client, users, detector, archives, run_tasks, tmp_path
):
    engineer = client_for(users["engineer"])
    engineer.post(
        API + "splits/",
        {"name": "ring-road", "revision": 1, "truth": file("labels.zip", archives["truth"])},
        format="multipart",
    )
    split = BenchmarkSplit.objects.get(name="ring-road")
    response = run_tasks(
        engineer.post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0.0",
            "split": split.pk,
            "predictions": file("dets.zip", archives["predictions"]),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    evaluation = Evaluation.objects.get(predictions__original_name="dets.zip", protocol="coco")
    assert evaluation.state == "done", evaluation.error
    truth = archives["reference"]
    json_dets = write.coco(tmp_path / "d.json", IMAGES, CLASSES, BOXES, detections=DETECTIONS)
    expected = engine.evaluate(truth, engine.load_predictions(json_dets, truth), "coco")
    assert evaluation.scorecard.summary["AP"] == pytest.approx(expected["summary"]["AP"])
    # the drill-down of each image reads the split (a label archive names no file_name)
    client.force_login(users["engineer"])
    version = evaluation.prediction_sets.get().version_id
    for index in range(len(IMAGES)):
        page = client.get(reverse("image-detail", args=[version, split.pk, index]))
        assert page.status_code == 200, index


def _stored_media():
    root = pathlib.Path(django_settings.MEDIA_ROOT)
    return sorted(
        str(p.relative_to(root))
        for p in root.rglob("*")
        if p.is_file() and "engine-cache" not in p.parts
    )


def _hostile():
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as z:
        z.writestr("000001.txt", "Car 0 0 -10 1 2 30 40 1 1 1 1 1 1 0\n")
        z.writestr("../evil.txt", "Car 0 0 -10 1 2 30 40 1 1 1 1 1 1 0\n")
    return buffer.getvalue()


def test_a_hostile_zip_is_refused_by_the_api_naming_the_member(users, team):
    before = _stored_media()
    response = client_for(users["engineer"]).post(
        API + "splits/",
        {"name": "ring-road", "revision": 1, "truth": file("labels.zip", _hostile())},
        format="multipart",
    )
    body = response.json()
    assert response.status_code == 400, body
    assert body["file"] == "labels.zip" and body["record"] == "../evil.txt"
    assert "leaves the archive" in body["message"]
    assert not BenchmarkSplit.objects.exists() and _stored_media() == before


def test_the_page_loads_a_zip_and_refuses_a_hostile_one(client, users, team, archives):
    client.force_login(users["engineer"])
    url = reverse("load-split")
    bad = client.post(
        url, {"name": "ring-road", "revision": 1, "truth": file("labels.zip", _hostile())}
    )
    assert bad.status_code == 400
    assert (
        "labels.zip: ../evil.txt: the member&#x27;s name leaves the archive" in bad.content.decode()
    )
    good = client.post(
        url, {"name": "ring-road", "revision": 1, "truth": file("labels.zip", archives["truth"])}
    )
    assert good.status_code == 302
    assert BenchmarkSplit.objects.get().sha256 == archives["reference"].content_hash()


def test_the_command_loads_a_zip(tmp_path, archives, capsys):
    path = tmp_path / "labels.zip"
    path.write_bytes(archives["truth"])
    call_command("load_split", "ring-road", "1", str(path))
    split = BenchmarkSplit.objects.get()
    assert split.source_format == "kitti"
    assert split.sha256 == archives["reference"].content_hash()
    assert json.dumps(split.class_counts)  # counted like any split
