"""Results files read by their first result's caption or keypoints key, through the
platform's entry points: upload page, API, ``upload_predictions``, the worker's
streamed and sharded run. Reference: pycocotools 2.0.11 (``COCO.loadRes`` reads the
results' own areas, or the keypoints' extent, then ``COCOeval(..., 'bbox')``), run
here on the same two files.
"""

import numpy as np
import pytest

from evaluation import services as evaluation_services

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

_SOURCE = {"caption": "own area and bbox as given", "keypoints": "keypoints' extent"}
_COUNT = {"caption": "given_area", "keypoints": "keypoint_area"}


def _results(truth, seed, reading):
    """Caption reading: own areas 0..20 times w*h; keypoints reading: points around
    each box (visibility 0 far off), some results giving a box that is replaced."""
    rng = np.random.default_rng(seed)
    out = []
    for i, det in enumerate(make_detections(rng, truth)):
        x, y, w, h = det["bbox"]
        if reading == "caption":
            record = {**det, "area": float(w * h * 20 * rng.random())}
            if i == 0:
                record["caption"] = "invented"
        else:
            k = int(rng.integers(1, 6))
            px, py = x + rng.random(k) * max(w, 1), y + rng.random(k) * max(h, 1)
            vis = rng.integers(0, 3, k)
            px[vis == 0] += 30
            kp = [v for triple in zip(px.tolist(), py.tolist(), vis.tolist()) for v in triple]
            record = {"image_id": det["image_id"], "category_id": det["category_id"]}
            record.update(keypoints=kp, score=det["score"])
            if i and i % 3 == 0:
                record["bbox"] = [1.0, 1.0, 4.0, 4.0]
        out.append(record)
    return out


def _recorded(card, reading):
    assert _SOURCE[reading] in card.result["protocol_record"]["area_source"]["predictions"]
    assert card.result["counts"]["boxes"]["predictions"][_COUNT[reading]] > 0


@pytest.mark.parametrize("reading", ["caption", "keypoints"])
def test_page_api_and_command_score_as_pycocotools(
    client, users, detector, run_tasks, tmp_path, reading
):
    truth = split_dict(n_images=6)
    split = evaluation_services.load_split(name="kp", revision=1, truth=upload("kp.json", truth))
    sets = [_results(truth, seed, reading) for seed in (1, 2, 3)]
    every_path_as_pycocotools(
        client,
        run_tasks,
        users,
        detector,
        split,
        truth,
        sets,
        tmp_path,
        lambda card: _recorded(card, reading),
    )


@pytest.mark.parametrize("reading", ["caption", "keypoints"])
def test_the_sharded_run_scores_as_pycocotools(
    users, detector, run_tasks, settings, tmp_path, monkeypatch, reading
):
    """Past the inline size the file is streamed into pieces and scored in shards."""
    truth = split_dict(n_images=8)
    dets = _results(truth, 4, reading)
    split = evaluation_services.load_split(name="kp", revision=1, truth=upload("kp.json", truth))
    version = upload_sharded(run_tasks, settings, monkeypatch, users, detector, split, dets)
    card = _assert_pycocotools_numbers(coco_evaluation(version), truth, dets, tmp_path)
    _recorded(card, reading)


def test_empty_keypoints_are_refused_naming_them(users, detector):
    """Empty keypoints on the second result: pycocotools 2.0.11's np.min raises; the
    API answers 400 naming file, record and field."""
    truth = split_dict(n_images=4)
    split = evaluation_services.load_split(name="kp", revision=1, truth=upload("kp.json", truth))
    dets = _results(truth, 5, "keypoints")[:2]
    dets[1]["keypoints"] = []
    text = refused_by_api(users, detector, split, dets)
    assert "record 1" in text and "keypoints" in text
