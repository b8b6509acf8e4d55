"""Results given as compressed RLE masks without ``bbox``, through the platform's entry
points: upload page, API, ``upload_predictions``, the worker's streamed and sharded
run, and the pipeline client. Reference: pycocotools 2.0.11 (``COCO.loadRes`` reads
each mask's area and box, ``COCOeval(..., 'bbox')``), run here on the same two files.
"""

import json

import numpy as np
import pytest
from pycocotools import mask as mask_utils

from evaluation import services as evaluation_services
from evaluation.models import Scorecard
from releases import tokens

from ..engine.synthetic import make_detections
from .conftest import split_dict, upload
from .test_any_ids import _assert_pycocotools_numbers
from .test_client import client_home, run  # noqa: F401
from .test_worker import worker  # noqa: F401
from .three_uploads import (
    coco_evaluation,
    every_path_as_pycocotools,
    refused_by_api,
    upload_sharded,
)

pytestmark = pytest.mark.django_db


def _masks(truth, seed):
    """Detections as RLE masks (pycocotools' own encoding) inside jittered boxes, with
    holes, so their areas differ from their boxes' w*h; every fourth gives a box too."""
    rng = np.random.default_rng(seed)
    frames = {im["id"]: (im["height"], im["width"]) for im in truth["images"]}
    out = []
    for i, det in enumerate(make_detections(rng, truth)):
        h, w = frames[det["image_id"]]
        x, y, bw, bh = (int(v) for v in det["bbox"])
        m = np.zeros((h, w), np.uint8)
        m[y : y + max(bh, 1), x : x + max(bw, 1)] = 1
        m &= (rng.random((h, w)) > 0.4 * rng.random()).astype(np.uint8)
        seg = mask_utils.encode(np.asfortranarray(m))
        record = {"image_id": det["image_id"], "category_id": det["category_id"]}
        record["segmentation"] = {"size": [h, w], "counts": seg["counts"].decode()}
        record["score"] = det["score"]
        if i and i % 4 == 0:
            record["bbox"] = det["bbox"]
        out.append(record)
    return out


def _mask_area_recorded(card):
    assert "mask area (RLE)" in card.result["protocol_record"]["area_source"]["predictions"]
    assert card.result["counts"]["boxes"]["predictions"]["mask_area"] > 0


def test_page_api_and_command_score_masks_as_pycocotools(
    client, users, detector, run_tasks, tmp_path
):
    truth = split_dict(n_images=6)
    split = evaluation_services.load_split(
        name="masks", revision=1, truth=upload("masks.json", truth)
    )
    sets = [_masks(truth, seed) for seed in (1, 2, 3)]
    every_path_as_pycocotools(
        client, run_tasks, users, detector, split, truth, sets, tmp_path, _mask_area_recorded
    )


def test_the_worker_and_the_sharded_run_score_masks_as_pycocotools(
    users, detector, run_tasks, settings, tmp_path, monkeypatch
):
    """Past the inline size the file is streamed into pieces and scored in shards."""
    truth = split_dict(n_images=8)
    dets = _masks(truth, 4)
    split = evaluation_services.load_split(
        name="masks", revision=1, truth=upload("masks.json", truth)
    )
    version = upload_sharded(run_tasks, settings, monkeypatch, users, detector, split, dets)
    card = _assert_pycocotools_numbers(coco_evaluation(version), truth, dets, tmp_path)
    _mask_area_recorded(card)
    assert Scorecard.objects.filter(evaluation__prediction_sets__version=version).exists()


def test_a_mask_pycocotools_cannot_read_is_refused_naming_it(users, detector):
    """Uncompressed RLE (counts as a list) on the second result: pycocotools 2.0.11's
    maskUtils.area raises; the API answers 400 naming file, record and field."""
    truth = split_dict(n_images=4)
    split = evaluation_services.load_split(
        name="masks", revision=1, truth=upload("masks.json", truth)
    )
    dets = _masks(truth, 5)[:2]
    dets[1]["segmentation"]["counts"] = [5, 3, 10]
    text = refused_by_api(users, detector, split, dets)
    assert "record 1" in text and "segmentation.counts" in text and "uncompressed RLE" in text


@pytest.mark.integration
@pytest.mark.django_db(transaction=True)
@pytest.mark.usefixtures("worker")
def test_the_client_submits_masks(live_server, detector, users, run, tmp_path):  # noqa: F811
    """The client uploads the file as it is; a real worker scores it; the stored
    numbers equal pycocotools 2.0.11's."""
    truth = split_dict(n_images=5)
    split = evaluation_services.load_split(
        name="masks", revision=1, truth=upload("masks.json", truth)
    )
    dets = _masks(truth, 6)
    _, token = tokens.create_token(users["engineer"], "pipeline")
    path = tmp_path / "masks-dt.json"
    path.write_text(json.dumps(dets))
    code, out, err = run(
        "submit", "--url", live_server.url, "--token", token, "--detector", "Forward camera",
        "--version", "6.0", "--split", f"masks={path}", "--wait", "--poll", "0.3",
    )  # fmt: skip
    assert code == 0, out + err
    version = detector.versions.get(label="6.0")
    assert split.pk == version.prediction_sets.get().split_id
    _mask_area_recorded(
        _assert_pycocotools_numbers(coco_evaluation(version), truth, dets, tmp_path)
    )
