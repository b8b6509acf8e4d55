"""The upload's fast paths give the bytes of the plain ones.

``shards.truth_slice`` lets every shard's truth slice reuse its split's class and
image part of ``GroundTruth.content_hash`` (hashed once, not once per shard); the
detections reader takes a record's fields with C-level getters and checks id types in
one pass. The references here are outside those paths: the canonical form the
``content_hash`` docstring states, written out again with ``hashlib`` (SHA-256 as FIPS
180-4 defines it, via Python's standard library), and Python's own ``json`` module
for what a results file holds (ids ``1``, ``1.0`` and ``true`` are one key, as
pycocotools keys dicts by them — common practice, from memory).
"""

import copy
import dataclasses
import hashlib
import json
import pickle

import numpy as np
import pytest

from evaluation.engine import InputError, load_truth
from evaluation.engine.data import ATTRIBUTES
from evaluation.engine.loaders import coco_json
from evaluation.engine.shards import plan, truth_slice

from .synthetic import make_split, write_json


def _reference_hash(truth):
    """``content_hash``'s canonical form (its docstring), computed from scratch."""
    digest = hashlib.sha256()
    digest.update(repr(list(zip(truth.class_ids.tolist(), truth.classes))).encode())
    digest.update(repr([str(i) for i in truth.image_ids]).encode())
    digest.update(np.asarray(truth.image_width, "<f8").tobytes())
    digest.update(np.asarray(truth.image_height, "<f8").tobytes())
    digest.update(repr([sorted(t) for t in truth.image_tags]).encode())
    attributes = truth.has_attributes()
    parts = [
        truth.box_image.astype("<f8"),
        truth.box_class.astype("<f8"),
        truth.boxes.astype("<f8"),
        truth.crowd.astype("<f8"),
        truth.difficult.astype("<f8"),
        truth.ignore.astype("<f8"),
        truth.box_area.astype("<f8"),
    ]
    if attributes:
        for name in ATTRIBUTES:
            values = np.asarray(getattr(truth, name), "<f8")
            parts.append(np.where(np.isnan(values), np.nan, values))
    columns = np.column_stack(parts)
    digest.update(np.ascontiguousarray(columns[np.lexsort(columns.T[::-1])]).tobytes())
    if attributes:
        regions = np.column_stack([truth.region_image.astype("<f8"), truth.regions])
        regions = regions[np.lexsort(regions.T[::-1])]
        digest.update(b"dont_care")
        digest.update(np.ascontiguousarray(regions, "<f8").tobytes())
    return digest.hexdigest()


@pytest.fixture
def tagged_truth(tmp_path):
    split = make_split(np.random.default_rng(15), n_images=60, tags=("night", "rain", "fog"))
    path = tmp_path / "truth.json"
    write_json(path, split)
    return load_truth(path)


@pytest.mark.parametrize("with_attributes", [False, True])
def test_every_slice_hashes_as_its_content_says(tagged_truth, with_attributes):
    truth = tagged_truth
    assert any(truth.image_tags), "the split must carry tags for the check to bite"
    if with_attributes:  # road attributes and a don't-care region make the long form
        occlusion = np.full(truth.n_boxes, np.nan)
        occlusion[::3] = 1.0
        truth = dataclasses.replace(
            truth,
            occlusion=occlusion,
            region_image=np.array([0, 7], np.int32),
            regions=np.array([[1.0, 2.0, 3.0, 4.0], [5.0, 6.0, 7.0, 8.0]]),
        )
    assert truth.content_hash() == _reference_hash(truth)
    hashes = set()
    for start, stop in plan(truth.n_images, 13):
        sliced, _ = truth_slice(truth, start, stop)
        hashes.add(sliced.content_hash())
        assert sliced.content_hash() == _reference_hash(sliced)
        # the slice still pickles and copies (what it shares is plain bytes)
        assert pickle.loads(pickle.dumps(sliced)).content_hash() == _reference_hash(sliced)
        assert copy.deepcopy(sliced).content_hash() == _reference_hash(sliced)
    assert len(hashes) == len(plan(truth.n_images, 13))  # slices differ: hashes differ


def test_a_truth_with_other_images_does_not_share(tagged_truth):
    truth = tagged_truth
    other = dataclasses.replace(truth, image_width=truth.image_width * 2)
    assert truth.share_images_digest(other) is False
    truth.content_hash()
    assert other.content_hash() == _reference_hash(other) != truth.content_hash()


def test_detection_columns_agree_with_python_json(tmp_path):
    records = [
        {"image_id": 3, "category_id": 1, "bbox": [1, 2.5, 3, 4], "score": 0.9},
        {"image_id": 3.0, "category_id": True, "bbox": [0.1, 0.2, 0.3, 0.4], "score": 1},
        {"image_id": 2**40, "category_id": 2, "bbox": [1e-300, 1e300, 5, 6], "score": 0.25},
    ]
    path = tmp_path / "dt.json"
    path.write_text(json.dumps(records))
    image, cls, boxes, score, *_ = coco_json.read_detections(path)
    expected = json.loads(path.read_text())  # the reference reading
    assert image.tolist() == [int(r["image_id"]) for r in expected]
    assert cls.tolist() == [int(r["category_id"]) for r in expected]
    assert boxes.shape == (3, 4)
    assert boxes.tolist() == [[float(v) for v in r["bbox"]] for r in expected]
    assert score.tolist() == [float(r["score"]) for r in expected]
    blocks = list(coco_json.detection_blocks(path))  # streamed: the same columns
    for k, want in enumerate((image, cls, boxes, score)):
        got = np.concatenate([block[k] for block in blocks])
        assert got.dtype == want.dtype and np.array_equal(got, want)


def test_empty_and_refused_detection_files(tmp_path):
    path = tmp_path / "empty.json"
    path.write_text("[]")
    image, cls, boxes, score, *_ = coco_json.read_detections(path)
    assert boxes.shape == (0, 4) and len(image) == len(cls) == len(score) == 0
    bad = tmp_path / "bad.json"
    bad.write_text(
        json.dumps(
            [
                {"image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5},
                {"image_id": 1, "category_id": 2.5, "bbox": [1, 2, 3, 4], "score": 0.5},
            ]
        )
    )
    with pytest.raises(
        InputError, match=r"record 1: field 'category_id': 2.5 is not an integer id"
    ):
        list(coco_json.detection_blocks(bad))
