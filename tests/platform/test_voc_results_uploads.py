"""Predictions as a zip of PASCAL VOC detection result files (the development kit's
``<comp>_det_<set>_<class>.txt``, lines ``image_id score xmin ymin xmax ymax``;
Everingham et al., IJCV 2010, ``VOCevaldet.m``) through the API, the upload page and
``manage.py upload_predictions``: recognised by content, scored exactly as the same
detections given as COCO JSON; a bad line is refused naming the archive, the member
file, its line and the field, storing nothing."""

import io
import json
import zipfile

import pytest
from django.core.management import call_command
from django.urls import reverse

from evaluation.models import Evaluation, PredictionFile
from releases import services

from .conftest import CLASSES, detections_for, upload
from .test_api import API, client_for, file

pytestmark = pytest.mark.django_db


def _detections(split_truth):
    out = detections_for(split_truth)
    for d in out:  # integer corners: xmax - xmin is exactly the width
        d["bbox"] = [float(round(v)) for v in d["bbox"]]
    out.sort(key=lambda d: d["category_id"])  # JSON order within a class = the file's
    return out


def _results_zip(detections, bad_line=None):
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as z:
        for cid, name in enumerate(CLASSES, start=1):
            lines = [
                f"{d['image_id']:06d} {d['score']!r} {d['bbox'][0]:g} {d['bbox'][1]:g} "
                f"{d['bbox'][0] + d['bbox'][2]:g} {d['bbox'][1] + d['bbox'][3]:g}"
                for d in detections
                if d["category_id"] == cid
            ]
            if bad_line and name == "car":
                lines.append(bad_line)
            z.writestr(f"results/VOC2007/Main/comp4_det_test_{name}.txt", "\n".join(lines) + "\n")
    return buffer.getvalue()


def _summaries(file_name):
    return {
        e.protocol: e.scorecard.summary
        for e in Evaluation.objects.filter(predictions__original_name=file_name)
    }


def _json_reference(detector, split, users, run_tasks, detections):
    version = services.create_version(detector, "ref", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("ref.json", detections),
        users["engineer"],
    )
    return _summaries("ref.json")


def test_the_api_scores_a_results_zip_like_the_same_json(
    detector, split, split_truth, users, run_tasks
):
    detections = _detections(split_truth)
    expected = _json_reference(detector, split, users, run_tasks, detections)
    response = run_tasks(
        client_for(users["engineer"]).post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("results.zip", _results_zip(detections)),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    assert set(expected) == {"coco", "voc"}
    assert _summaries("results.zip") == expected


def test_the_page_and_the_command_take_a_results_zip(
    client, detector, split, split_truth, users, run_tasks, tmp_path
):
    detections = _detections(split_truth)
    expected = _json_reference(detector, split, users, run_tasks, detections)
    client.force_login(users["engineer"])
    response = run_tasks(
        client.post,
        reverse("upload", args=[detector.pk]),
        {
            "version": "2.1",
            "split": split.pk,
            "predictions": upload("page.zip", _results_zip(detections)),
        },
    )
    assert response.status_code == 302
    assert _summaries("page.zip") == expected

    path = tmp_path / "shell.zip"
    # Another byte layout of the same detections (stored, members in another order).
    with zipfile.ZipFile(io.BytesIO(_results_zip(detections))) as z:
        members = {n: z.read(n) for n in z.namelist()}
    with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED) as z:
        for name, data in sorted(members.items(), reverse=True):
            z.writestr(name, data)
    run_tasks(
        call_command,
        "upload_predictions",
        str(path),
        "--detector",
        detector.slug,
        "--label",
        "2.2",
        "--split",
        f"{split.name}:{split.revision}",
        "--user",
        "engineer",
        "--create-version",
        stdout=io.StringIO(),
    )
    assert _summaries("shell.zip") == expected


def test_a_bad_line_is_refused_naming_member_line_and_field(detector, split, split_truth, users):
    detections = _detections(split_truth)
    before = PredictionFile.objects.count()
    response = client_for(users["engineer"]).post(
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("bad.zip", _results_zip(detections, "000001 0.5 1 2 three 4")),
        },
        format="multipart",
    )
    body = response.json()
    assert response.status_code == 400, body
    cars = sum(d["category_id"] == 1 for d in detections)
    assert body["file"] == "bad.zip"
    assert body["record"] == f"results/VOC2007/Main/comp4_det_test_car.txt line {cars + 1}"
    assert body["field"] == "xmax" and "expected a number, got 'three'" in body["message"]
    assert PredictionFile.objects.count() == before
    assert json.dumps(body)
