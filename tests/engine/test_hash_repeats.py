"""The annotations of a repeated id as given in the content hash (red team audit12 F3).

Two COCO JSON files differing only in the bbox of an earlier annotation whose id a
later annotation repeats: pycocotools 2.0.11 scores copies of the later annotation in
both (``COCO.loadAnns`` reads ``anns[id]``, the last annotation given that id), so its
numbers are equal; the VOC devkit never reads ids (``VOCevaldet.m`` reads every object
of the image), so it scores them apart. The ``repeats`` hash (engine 2.22.0) hashes the
rows as given and tells the files apart; ``heights`` (the scheme before) hashes them
alike, as engine 2.21.0 did, so a split frozen then verifies. A split without rows as
given hashes bit for bit as under ``heights`` (pinned: run on main before this change).

Checked against: pycocotools 2.0.11 run in the test (``conftest.pycocotools_eval``);
the VOC devkit transliteration ``oracle.voc_ap`` (``VOCevaldet.m``/``VOCap.m``, written
from the published code's logic) on each file with its ids made unique (the devkit
never reads ids: each annotation as given).
"""

import copy
import dataclasses
import json

import numpy as np
import pytest

from evaluation.engine import (
    ENGINE_VERSION,
    differences,
    evaluate,
    load_predictions,
    load_truth,
)
from evaluation.engine.data import REPEATED_GIVEN
from evaluation.engine.explain import REPEATS_FINGERPRINT
from evaluation.engine.loaders import cache as cache_module

from . import oracle
from .conftest import pycocotools_eval
from .test_repeated_ids import CONVERTER, _equal_pycocotools, _random_split, _unique


def _ann(ann_id, image_id, bbox):
    return {
        "id": ann_id,
        "image_id": image_id,
        "category_id": 1,
        "bbox": bbox,
        "area": bbox[2] * bbox[3],
        "iscrowd": 0,
    }


#: Annotation id 1 is given on image 1, then again on image 2: pycocotools reads copies
#: of the image 2 box for both; the devkit reads the image 1 box where the file has it.
EARLIER = {
    "images": [{"id": 1, "width": 100, "height": 100}, {"id": 2, "width": 100, "height": 100}],
    "categories": [{"id": 1, "name": "car"}],
    "annotations": [
        _ann(1, 1, [10, 10, 20, 20]),
        _ann(2, 1, [50, 50, 20, 20]),
        _ann(1, 2, [5, 5, 30, 30]),
    ],
}
#: The same file but for the earlier annotation's bbox (never read by pycocotools).
MOVED = copy.deepcopy(EARLIER)
MOVED["annotations"][0]["bbox"] = [60, 10, 20, 20]
#: ``content_hash()`` of both files under engine 2.21.0 (run on main before this
#: change): a split frozen then verifies under ``heights``.
PAIR_HASH_2_21 = "6ff77278c6fd0d3de1ef3b7a56f125be3e45a2ba52088fcf21871be7f87bae92"
#: A perfect detector on ``EARLIER`` as given.
DETECTIONS = [
    {"image_id": a["image_id"], "category_id": 1, "bbox": a["bbox"], "score": s}
    for a, s in zip(EARLIER["annotations"], (0.9, 0.8, 0.7))
]


def _write(tmp_path, name, content):
    path = tmp_path / f"{name}.json"
    path.write_text(json.dumps(content))
    return path


def _pair(tmp_path):
    return load_truth(_write(tmp_path, "earlier", EARLIER)), load_truth(
        _write(tmp_path, "moved", MOVED)
    )


def test_files_differing_in_a_replaced_annotation_hash_apart(tmp_path):
    """(a) ``repeats`` (the default) hashes the pair apart; ``heights`` alike, as engine
    2.21.0 did (pinned), so splits frozen under it keep verifying."""
    earlier, moved = _pair(tmp_path)
    assert (earlier.repeated == REPEATED_GIVEN).sum() == 1
    assert earlier.content_hash() == earlier.content_hash("repeats")
    assert earlier.content_hash() != moved.content_hash()
    assert earlier.content_hash("heights") == moved.content_hash("heights") == PAIR_HASH_2_21
    for scheme in ("named", "typed", "untyped"):  # no id kinds, names, heights: as before
        assert earlier.content_hash(scheme) == moved.content_hash(scheme) == PAIR_HASH_2_21
    # the rows as given are marked: the same rows, unmarked (every row read), differ
    unmarked = dataclasses.replace(earlier, repeated=None)
    assert unmarked.n_boxes == earlier.n_boxes == 4
    assert unmarked.content_hash() != earlier.content_hash()
    # and marked apart from another optional column of the same values (``vis_ratio``,
    # hashed where it says more than the visibility, without a mark of its own)
    other = dataclasses.replace(unmarked, vis_ratio=earlier.repeated.astype(float))
    assert other._vis_ratio_says_more()
    assert other.content_hash() != earlier.content_hash()


def test_the_devkit_scores_the_pair_apart_and_pycocotools_alike(tmp_path):
    """(b) What the hash must tell apart: the VOC devkit transliteration
    (``oracle.voc_ap``, each annotation as given: the files with unique ids) scores the
    perfect detector 1.0 on one file and less on the other, and ``voc``/``voc07`` equal
    it; pycocotools 2.0.11 (``loadAnns`` keeps the last annotation per id) gives both
    files the same 12 numbers, and ``coco`` equals them."""
    dt = _write(tmp_path, "dt", DETECTIONS)
    devkit = {}
    for name, content in (("earlier", EARLIER), ("moved", MOVED)):
        truth = load_truth(_write(tmp_path, name, content))
        predictions = load_predictions(dt, truth)
        unique = load_truth(_write(tmp_path, f"{name}-unique", _unique(content)))
        for protocol, eleven in (("voc07", True), ("voc", False)):
            expected = oracle.voc_ap(unique, load_predictions(dt, unique), eleven_point=eleven)
            got = evaluate(truth, predictions, protocol)["per_class"]["car"]["AP"]
            assert got == pytest.approx(expected[0], abs=1e-12), (name, protocol)
            devkit[name, protocol] = expected[0]
        reference = pycocotools_eval(_write(tmp_path, f"{name}-p", content), dt)
        _equal_pycocotools(evaluate(truth, predictions, "coco"), truth, reference)
        devkit[name, "pycocotools"] = reference.stats
    for protocol in ("voc07", "voc"):
        assert devkit["earlier", protocol] == pytest.approx(1.0, abs=1e-15)
        assert devkit["moved", protocol] < 0.9, protocol
    assert np.array_equal(devkit["earlier", "pycocotools"], devkit["moved", "pycocotools"])


@pytest.mark.parametrize("seed", range(6))
def test_random_files_with_a_replaced_annotation_moved(tmp_path, seed):
    """(a) on random files with repeated ids (``test_repeated_ids._random_split``):
    moving an annotation that a later one with its id replaces changes the ``repeats``
    hash, not the ``heights`` one; pycocotools 2.0.11 gives both files the same numbers
    (it never reads that annotation)."""
    split, dets = _random_split(seed)
    ids = [a["id"] for a in split["annotations"]]
    replaced = next(k for k, i in enumerate(ids) if i in ids[k + 1 :])
    moved = copy.deepcopy(split)
    moved["annotations"][replaced]["bbox"][0] += 7.0
    one = load_truth(_write(tmp_path, "one", split))
    other = load_truth(_write(tmp_path, "other", moved))
    assert one.content_hash() != other.content_hash()
    assert one.content_hash("heights") == other.content_hash("heights")
    dt = _write(tmp_path, "dt", dets)
    stats = [
        pycocotools_eval(_write(tmp_path, n, s), dt).stats for n, s in (("p", split), ("q", moved))
    ]
    assert np.array_equal(*stats)


#: ``content_hash()`` under engine 2.21.0 (scheme ``heights``; run on main before this
#: change) of files without repeated ids: the converter file with unique ids, the same
#: with one height key other than its box's h, ``_random_split(seed)`` made unique.
NO_REPEATS_2_21 = {
    "converter": "0516fc664421fe6c535689650c5aaa84125cbd624a240feab017f96b012ee5e2",
    "height key": "c040d549677958a56ce328ff798eb559232c5545df7fc330e7e50e7f0c1e11d2",
    0: "e23b99b5b5816c43ab71fa3b497c456d889a6c33fee8a978de9222aeab346dd2",
    1: "d9260d56b41483d00b489c079868a0b22238a2ad216d67b455958259b5ab8cad",
    2: "c3f22d1b7e3d89b30c9c97d0b0d64a68e263ee886acbc23e3deef37f5236490a",
}


def _no_repeats(case):
    if case == "converter":
        return _unique(CONVERTER)
    if case == "height key":
        split = _unique(CONVERTER)
        split["annotations"][0]["height"] = 33.0
        return split
    return _unique(_random_split(case)[0])


@pytest.mark.parametrize("case", list(NO_REPEATS_2_21))
def test_a_split_without_repeated_ids_hashes_as_before(tmp_path, case):
    """(c) No annotation as given: ``repeats`` is bit for bit the ``heights`` hash, the
    one engine 2.21.0 gave (pinned), from the file and from the cache."""
    path = _write(tmp_path, "gt", _no_repeats(case))
    for cache_dir in (None, tmp_path / "cache", tmp_path / "cache"):
        truth = load_truth(path, cache_dir=cache_dir)
        assert truth.repeated is None
        assert truth.content_hash() == truth.content_hash("heights") == NO_REPEATS_2_21[case]


def test_the_cache_keeps_the_repeats_hash(tmp_path):
    """A truth entry stores the newest hash (``corners``, which is the ``repeats`` hash
    of a split without corners as read: the rows as given are cached with their mark);
    an entry written before engine 2.23.0 holds it under its old name
    (``__repeats_content_hash__``), one before 2.22.0 the ``heights`` hash, which a load
    drops (the newest is then computed)."""
    path = _write(tmp_path, "earlier", EARLIER)
    truth = load_truth(path)
    for _ in range(2):  # written, then read
        again = load_truth(path, cache_dir=tmp_path / "cache")
        assert again.content_hash() == truth.content_hash() != truth.content_hash("heights")
        assert again.content_hash("heights") == PAIR_HASH_2_21
    arrays = cache_module._to_arrays(truth)
    meta = json.loads(str(arrays["__meta__"]))
    assert meta["__corners_content_hash__"] == truth.content_hash()
    assert truth.content_hash() == truth.content_hash("repeats")
    for older in ("__repeats_content_hash__", "__heights_content_hash__"):
        meta[older] = meta.pop("__corners_content_hash__")
        arrays["__meta__"] = np.array(json.dumps(meta))
        old = cache_module._from_arrays("truth", arrays)
        assert "_content_hash" not in old.__dict__
        assert old.content_hash() == truth.content_hash()
        meta["__corners_content_hash__"] = meta.pop(older)


def test_explain_says_an_older_fingerprint_may_be_the_same_split(tmp_path):
    """A split with repeated ids changed fingerprint with engine ``REPEATS_FINGERPRINT``."""
    earlier, _ = _pair(tmp_path)
    assert tuple(map(int, REPEATS_FINGERPRINT.split("."))) <= tuple(
        map(int, ENGINE_VERSION.split("."))
    )

    def result(version, fingerprint):
        return {"engine_version": version, "truth_fingerprint": fingerprint, "protocol_record": {}}

    before = result("2.21.0", earlier.content_hash("heights"))
    after = result(ENGINE_VERSION, earlier.content_hash())
    (effect,) = [d[3] for d in differences(before, after) if d[0] == "ground truth"]
    assert f"fingerprinted by an engine before {REPEATS_FINGERPRINT}" in effect
    assert "annotation ids repeat" in effect
    same = result("2.21.0", after["truth_fingerprint"])
    assert not [d for d in differences(same, after) if d[0] == "ground truth"]
