"""Detections as KITTI label files, YOLO label files (with ``classes.txt``) and VOC
result files (``<comp>_det_<set>_<class>.txt``), zipped, through every upload entry
point — API, page, management command — scored exactly as the same detections in
COCO JSON (layouts: the KITTI object devkit's readme, the YOLO label layout, the VOC
devkit's ``VOCevaldet.m``). The pipeline client's uploads go through the same API
(tests/platform/test_client_road.py sends a KITTI zip)."""

import pytest
from django.core.management import call_command
from django.urls import reverse

from evaluation import engine
from evaluation.services import load_split
from releases.models import PredictionSet

from ..engine import label_writers as write
from .conftest import upload
from .test_api import API, client_for, file
from .test_label_archives import BOXES, DETECTIONS, IMAGES, _zip_bytes

pytestmark = pytest.mark.django_db
CLASSES = ["car", "cyclist", "pedestrian"]  # the detector fixture's classes
LOWER = [(i, c.lower(), b, a) for i, c, b, a in BOXES]
DETS = [(i, c.lower(), b, s) for i, c, b, s in DETECTIONS]


def _voc_results(folder):
    folder.mkdir(parents=True)
    for name in CLASSES:
        rows = [
            f"{i:06d} {s!r} {b[0]!r} {b[1]!r} {b[0] + b[2]!r} {b[1] + b[3]!r}\n"
            for i, c, b, s in DETS
            if c == name
        ]
        (folder / f"comp4_det_test_{name}.txt").write_text("".join(rows))
    return folder


WRITERS = {
    "kitti": lambda folder: write.kitti(folder, IMAGES, CLASSES, LOWER, detections=DETS),
    "yolo": lambda folder: write.yolo(folder, IMAGES, CLASSES, LOWER, detections=DETS),
    "voc_det": _voc_results,
}


@pytest.fixture
def road_split(tmp_path):
    truth = write.coco(tmp_path / "truth.json", IMAGES, CLASSES, LOWER)
    split = load_split(name="bay-night", revision=1, truth=upload("t.json", truth.read_bytes()))
    reference = engine.load_truth(truth)
    dets = write.coco(tmp_path / "dets.json", IMAGES, CLASSES, LOWER, detections=DETS)
    expected = engine.evaluate(reference, engine.load_predictions(dets, reference), "coco")
    return split, expected


def _send(entry, archive, detector, split, users, client, run_tasks, tmp_path):
    if entry == "api":
        response = run_tasks(
            client_for(users["engineer"]).post,
            API + "prediction-sets/",
            {
                "detector": detector.pk,
                "version": "5.0",
                "split": split.pk,
                "predictions": file("dets.zip", archive),
            },
            format="multipart",
        )
        assert response.status_code == 201, response.json()
    elif entry == "page":
        client.force_login(users["engineer"])
        response = run_tasks(
            client.post,
            reverse("upload", args=[detector.pk]),
            {"version": "5.0", "split": split.pk, "predictions": upload("dets.zip", archive)},
        )
        assert response.status_code == 302, response.content.decode()[:500]
    else:
        path = tmp_path / "dets.zip"
        path.write_bytes(archive)
        run_tasks(
            call_command,
            "upload_predictions",
            str(path),
            detector="forward-camera",
            label="5.0",
            split="bay-night:1",
            user="engineer",
            create_version=True,
        )


@pytest.mark.parametrize("entry", ["api", "page", "command"])
@pytest.mark.parametrize("fmt", sorted(WRITERS))
def test_label_file_detections_score_as_coco_json_on_every_entry_point(
    fmt, entry, road_split, detector, users, client, run_tasks, tmp_path
):
    split, expected = road_split
    archive = _zip_bytes(WRITERS[fmt](tmp_path / fmt))
    _send(entry, archive, detector, split, users, client, run_tasks, tmp_path)
    prediction_set = PredictionSet.objects.current().get(version__label="5.0")
    evaluation = prediction_set.evaluations.get(protocol="coco")
    assert evaluation.state == "done", evaluation.error
    card = evaluation.scorecard
    assert card.summary == pytest.approx(expected["summary"], abs=1e-12)
    rows = {r.class_name: r.ap for r in card.classes.all() if r.class_name}
    for name, row in expected["per_class"].items():
        if row["AP"] is None:
            assert rows[name] is None
        else:
            assert rows[name] == pytest.approx(row["AP"], abs=1e-12), name
