"""Results read "as given" (the first result has no caption, non-empty bbox,
segmentation or keypoints: pycocotools 2.0.11 keeps every result's own bbox, area and
id) through the platform's entry points: upload page, API, ``upload_predictions``, and
the worker's streamed and sharded run. Reference: pycocotools 2.0.11 run here on the
same two files; the stored scorecard equals it.
"""

import numpy as np
import pytest

from evaluation import services as evaluation_services
from releases import services

from ..engine.synthetic import make_detections
from .conftest import split_dict, upload
from .test_any_ids import _assert_pycocotools_numbers
from .three_uploads import (
    coco_evaluation,
    every_path_as_pycocotools,
    refused_by_api,
    upload_sharded,
)

pytestmark = pytest.mark.django_db


def _results(truth, seed):
    """A first result of a category the split does not list, without bbox (never
    compared); then detections with their own areas (0..20 times w*h) and ids drawn
    from a small pool: repeated, 0 and negative among them."""
    rng = np.random.default_rng(seed)
    first = {"id": 1, "image_id": truth["images"][0]["id"], "category_id": 999, "score": 0.5}
    out = [first]
    for det in make_detections(rng, truth):
        w, h = det["bbox"][2], det["bbox"][3]
        record = {**det, "area": float(w * h * 20 * rng.random())}
        record["id"] = int(rng.integers(-2, 8)) if rng.random() < 0.3 else len(out) + 100
        out.append(record)
    out[1]["id"] = 0  # a free id (its last result keeps id 0)
    return out


def _recorded(card):
    record = card.result["protocol_record"]["area_source"]["predictions"]
    assert "own area, bbox and id as given" in record
    counted = card.result["counts"]["boxes"]["predictions"]
    assert counted["as_given_area"] > 0 and counted["replaced_by_id"] > 0
    assert counted["free_id"] > 0


def test_page_api_and_command_score_as_pycocotools(client, users, detector, run_tasks, tmp_path):
    truth = split_dict(n_images=6)
    split = evaluation_services.load_split(name="ag", revision=1, truth=upload("ag.json", truth))
    sets = [_results(truth, seed) for seed in (1, 2, 3)]
    every_path_as_pycocotools(
        client, run_tasks, users, detector, split, truth, sets, tmp_path, _recorded
    )


def test_the_sharded_run_scores_as_pycocotools(
    users, detector, run_tasks, settings, tmp_path, monkeypatch
):
    """Past the inline size the file is streamed into pieces (read whole: an id reaches
    across the file) and scored in shards."""
    truth = split_dict(n_images=8)
    dets = _results(truth, 4)
    split = evaluation_services.load_split(name="ag", revision=1, truth=upload("ag.json", truth))
    version = upload_sharded(run_tasks, settings, monkeypatch, users, detector, split, dets)
    card = _assert_pycocotools_numbers(coco_evaluation(version), truth, dets, tmp_path)
    _recorded(card)


def test_a_result_without_id_is_refused_naming_it(users, detector):
    """pycocotools 2.0.11's createIndex raises KeyError on a result without id: the API
    answers 400 naming file, record and field."""
    truth = split_dict(n_images=4)
    split = evaluation_services.load_split(name="ag", revision=1, truth=upload("ag.json", truth))
    dets = _results(truth, 5)[:3]
    del dets[2]["id"]
    text = refused_by_api(users, detector, split, dets)
    assert "record 2" in text and "id" in text


def test_a_matching_text_id_fails_the_coco_evaluation_only(
    users, detector, split, split_truth, run_tasks
):
    """A detection whose id numpy cannot write into pycocotools' float ``gtm`` ("x")
    matches a truth box: pycocotools 2.0.11's evaluateImg raises ValueError, so the
    ``coco`` evaluation fails naming record and field; ``voc`` (no ids read) scores."""
    from evaluation.models import Evaluation

    dets = _results(split_truth, 6)
    box = next(a for a in split_truth["annotations"] if not a.get("iscrowd"))
    dets.append(
        {"id": "x", "image_id": box["image_id"], "category_id": box["category_id"],
         "score": 0.99, "bbox": box["bbox"], "area": 100.0}
    )  # fmt: skip
    version = services.create_version(detector, "6.0", users["engineer"])
    run_tasks(
        services.submit_predictions, version, split, upload("x.json", dets), users["engineer"]
    )
    evaluations = {
        e.protocol: e for e in Evaluation.objects.filter(prediction_sets__version=version)
    }
    assert evaluations["voc"].state == "done", evaluations["voc"].error
    coco = evaluations["coco"]
    assert coco.state == "failed"
    assert f"record {len(dets) - 1}" in coco.error and "field 'id'" in coco.error
