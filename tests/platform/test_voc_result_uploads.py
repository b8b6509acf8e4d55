"""One class's lone PASCAL VOC detection result file (``comp4_det_test_car.txt``: the
VOC devkit's ``VOCopts.detrespath`` names it ``<comp>_det_<set>_<class>.txt``, and
``VOCevaldet.m`` reads ``image_id score xmin ymin xmax ymax`` a line) through every
entry point — API, page, command — scored as the same class's detections in COCO
JSON; the class comes from the name the file was uploaded as, even when the same
bytes were stored first under another class's name; a bad line is refused naming
file, line and field, storing nothing."""

import json

import pytest
from django.core.management import call_command
from django.urls import reverse

from evaluation import engine
from evaluation.models import Evaluation, PredictionFile
from releases.models import PredictionSet

from .conftest import detections_for, set_suite_policy, upload
from .test_api import API, client_for, file

pytestmark = pytest.mark.django_db


def _result_file(split_truth, class_name):
    """The detections of one class as its devkit result file, and as COCO JSON."""
    cid = next(c["id"] for c in split_truth["categories"] if c["name"] == class_name)
    ours = [d for d in detections_for(split_truth) if d["category_id"] == cid]
    lines = []
    for d in ours:
        x, y, w, h = d["bbox"]
        lines.append(f"{d['image_id']} {d['score']!r} {x!r} {y!r} {x + w!r} {y + h!r}")
        d["bbox"] = [x, y, (x + w) - x, (y + h) - y]  # the corners' own width, as read
    return ("\n".join(lines) + "\n").encode(), ours


def _expected(split_truth, as_json, tmp_path, protocol="coco"):
    (tmp_path / "gt.json").write_text(json.dumps(split_truth))
    (tmp_path / "dt.json").write_text(json.dumps(as_json))
    truth = engine.load_truth(tmp_path / "gt.json")
    return engine.evaluate(truth, engine.load_predictions(tmp_path / "dt.json", truth), protocol)


def _card(version_label, protocol="coco"):
    prediction_set = PredictionSet.objects.current().get(version__label=version_label)
    evaluation = prediction_set.evaluations.get(protocol=protocol)
    assert evaluation.state == "done", evaluation.error
    return evaluation.scorecard


def test_api_page_and_command_score_a_lone_result_file_as_its_class(
    users, detector, split, split_truth, run_tasks, client, tmp_path
):
    car, car_json = _result_file(split_truth, "car")
    expected = _expected(split_truth, car_json, tmp_path)
    response = run_tasks(
        client_for(users["engineer"]).post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("comp4_det_test_car.txt", car),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    card = _card("2.0")
    rows = {r.class_name: r.ap for r in card.classes.all()}
    assert rows["car"] == pytest.approx(expected["per_class"]["car"]["AP"], abs=1e-12)
    assert rows["pedestrian"] == 0.0  # present in the split, not detected
    assert card.summary["AP"] == pytest.approx(expected["summary"]["AP"], abs=1e-12)

    # The same bytes as the pedestrian file, through the page: one stored file (named
    # for car), read as pedestrian because that is the name it was uploaded as.
    client.force_login(users["engineer"])
    page = run_tasks(
        client.post,
        reverse("upload", args=[detector.pk]),
        {
            "version": "2.1",
            "split": split.pk,
            "predictions": upload("comp4_det_test_pedestrian.txt", car),
        },
    )
    assert page.status_code == 302
    assert PredictionFile.objects.count() == 1
    as_pedestrian = [
        {
            **d,
            "category_id": next(
                c["id"] for c in split_truth["categories"] if c["name"] == "pedestrian"
            ),
        }
        for d in car_json
    ]
    moved = _expected(split_truth, as_pedestrian, tmp_path)
    rows = {r.class_name: r.ap for r in _card("2.1").classes.all()}
    assert rows["car"] == 0.0
    assert rows["pedestrian"] == pytest.approx(moved["per_class"]["pedestrian"]["AP"], abs=1e-12)

    # The command, from a file on disk.
    cyclist, cyclist_json = _result_file(split_truth, "cyclist")
    path = tmp_path / "comp4_det_val_cyclist.txt"
    path.write_bytes(cyclist)
    run_tasks(
        call_command,
        "upload_predictions",
        str(path),
        detector="forward-camera",
        label="2.2",
        split="bay-night:1",
        user="engineer",
        create_version=True,
    )
    expected = _expected(split_truth, cyclist_json, tmp_path)
    rows = {r.class_name: r.ap for r in _card("2.2").classes.all()}
    assert rows["cyclist"] == pytest.approx(expected["per_class"]["cyclist"]["AP"], abs=1e-12)


def test_a_bad_line_or_an_unknown_class_is_refused_naming_file_line_and_field(
    users, detector, split, split_truth
):
    """A bad line always; a class the split does not list under the strict class option
    a lead picked (by default such detections are dropped and counted, as pycocotools
    does: test_input_policies.py)."""
    set_suite_policy(detector, users["lead"], unknown_classes="reject")
    car, _ = _result_file(split_truth, "car")
    engineer = client_for(users["engineer"])

    def post(name, content):
        return engineer.post(
            API + "prediction-sets/",
            {
                "detector": detector.pk,
                "version": "3.0",
                "split": split.pk,
                "predictions": file(name, content),
            },
            format="multipart",
        )

    bad = post("comp4_det_test_car.txt", car + b"1 0.5 10 20 x 40\n")
    body = bad.json()
    assert bad.status_code == 400, body
    lines = len(car.splitlines()) + 1
    assert body["file"] == "comp4_det_test_car.txt"
    assert body["record"] == f"comp4_det_test_car.txt line {lines}" and body["field"] == "xmax"
    unknown = post("comp4_det_test_tram.txt", car).json()
    assert "class 'tram' is not one of the split's classes" in unknown["message"]
    assert unknown["field"] == "file name"
    assert not PredictionFile.objects.exists() and not Evaluation.objects.exists()
