"""``miss-rate-cityscale`` is scored on the whole file even where the platform shards
the primary protocol, so its refusal names the record the CityPersons script raises
on (the script reads both files whole: ``eval_demo.py``), not a shard's first.

The file: image 1's detections are booleans; image 2's top detection scores 0.9 but is
10 px tall (below every setup's height filter), its other one is ``false``. pycocotools
2.0.11 (``coco``, the primary) joins image 2's 0.9 and scores the file; the script's
``accumulate`` joins booleans alone in setup 0 and raises (checked against
``tests/engine/pedestrian_oracle.cityscale_script`` in
``tests/engine/test_cityscale_booleans.py``): record 1, the first boolean in file order
among the kept detections (image 2's ``false``, written before image 1's ``true``).
"""

import pytest

from evaluation import class_groups, sharding
from evaluation import services as evaluation_services
from evaluation.models import Evaluation, EvaluationShard
from releases import services

from .conftest import upload
from .test_shards import GROUP_SENDS, _run

pytestmark = pytest.mark.django_db


def _split():
    images = [{"id": i, "width": 2048, "height": 1024} for i in (1, 2, 3, 4)]
    annotations = [
        {"id": i, "image_id": i, "category_id": 1, "bbox": [0.0, 0.0, 41.0, 100.0],
         "area": 4100.0, "iscrowd": 0, "height": 100.0, "vis_ratio": 1.0, "ignore": 0}
        for i in (1, 2)
    ]  # fmt: skip
    return {
        "images": images,
        "categories": [{"id": 1, "name": "person"}],
        "annotations": annotations,
    }


def _det(image, score, h=100.0):
    return {"image_id": image, "category_id": 1, "bbox": [0.0, 0.0, 0.41 * h, h], "score": score}


def test_cityscale_is_scored_whole_and_names_the_scripts_record(
    run_tasks, settings, monkeypatch, team, users, django_capture_on_commit_callbacks
):
    split = evaluation_services.load_split(
        name="city-whole", revision=1, truth=upload("gt.json", _split())
    )
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(
            team,
            "City whole",
            ["person"],
            protocols=("coco", "miss-rate-cityscale"),
            splits=["city-whole"],
        )
    sends = []
    GROUP_SENDS.clear()
    monkeypatch.setattr(sharding, "send", lambda *args: sends.append(args))
    monkeypatch.setattr(class_groups, "send", lambda *args: GROUP_SENDS.append(args))
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 1
    settings.BENCHBOOK_SHARD_ABOVE = 0
    settings.BENCHBOOK_SHARD_IMAGES = 1  # a shard per image
    dets = [_det(2, 0.9, h=10.0), _det(2, False), _det(1, True), _det(1, True)]
    version = services.create_version(detector, "1.0", users["engineer"])
    run_tasks(
        services.submit_predictions, version, split, upload("dets.json", dets), users["engineer"]
    )
    _run(run_tasks, sends)
    primary = Evaluation.objects.get(protocol="coco")
    assert primary.state == "done", primary.error
    assert EvaluationShard.objects.filter(evaluation=primary).count() == 4  # sharded
    city = Evaluation.objects.get(protocol="miss-rate-cityscale")
    assert city.state == "failed"
    assert not EvaluationShard.objects.filter(evaluation=city).exists()  # read whole
    assert "record 1" in city.error and "'score'" in city.error, city.error
    assert "setup 'reasonable'" in city.error
