"""pycocotools' exact order of integer scores beyond 2**53 along every path that orders
detections: image weights, class groups (the platform's sharded run), TIDE and reasons.

The file mixes classes pycocotools ranks exactly (int64 and object lists: 2**60 + k,
ties of float64, one int64 wrap-around at -2**63), a class joined as float64 (a float
among the integers) and classes of plain floats. Its numbers under ``coco`` are checked
against pycocotools 2.0.11; every other path is checked against the whole run, or
against the same file with images duplicated (the definition of an image weight).
"""

import json

import numpy as np
import pytest

from evaluation.engine import (
    COCO_SUMMARY_KEYS,
    evaluate,
    load_predictions,
    load_truth,
    match,
    score_records,
)
from evaluation.engine.tide import error_breakdown

from .conftest import as_reference, pycocotools_eval
from .synthetic import make_detections, make_split
from .test_class_groups import whole_and_grouped
from .test_weights import _duplicate, _numbers

B = 2**60
N_CLASSES = 6


def _big_scores(rng, split, dets):
    """Class 1: 2**60 + k (k of 0..3, ties of float64 and not of int64); class 2: the
    same plus one float (the class is joined as float64); class 3: beyond 2**64 (object
    lists); class 4: small integers and one -2**63 (int64 negation wraps); the rest
    keep float scores. Class confusions cross classes, for TIDE."""
    for ann in rng.choice(split["annotations"], size=len(split["annotations"]) // 4):
        x, y, w, h = ann["bbox"]
        dets.append(
            {
                "image_id": ann["image_id"],
                "category_id": int(ann["category_id"] % N_CLASSES + 1),
                "bbox": [x + 0.05 * w, y, w, h * 0.95],
                "score": float(rng.integers(1, 7) / 6),
            }
        )
    wrapped = False
    for d in dets:
        k = int(rng.integers(0, 4))
        if d["category_id"] == 1:
            d["score"] = B + k
        elif d["category_id"] == 2:
            d["score"] = B + k if rng.random() < 0.9 else 0.5
        elif d["category_id"] == 3:
            d["score"] = 2**64 + k
        elif d["category_id"] == 4:
            d["score"] = -(2**63) if not wrapped else k
            wrapped = True
    return dets


def _inputs(files, seed, n_images=24):
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=n_images, n_classes=N_CLASSES, boxes_per_image=4)
    dets = _big_scores(rng, split, make_detections(rng, split, score_levels=6))
    return rng, split, dets


def _coco_equal(files, split, dets):
    truth, predictions = files.load(split, dets)
    gt, dt = files.write("gt-ref.json", split), files.write("dt-ref.json", dets)
    reference = pycocotools_eval(gt, dt)
    ours = evaluate(truth, predictions, "coco")
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    precision = reference.eval["precision"]
    cat_ids = sorted(c["id"] for c in split["categories"])
    for k, cat in enumerate(cat_ids):
        name = next(c["name"] for c in split["categories"] if c["id"] == cat)
        p = precision[:, :, k, 0, 2]
        expected = None if np.all(p == -1) else pytest.approx(np.mean(p), abs=1e-12)
        assert ours["per_class"][name]["AP"] == expected, name
    return truth, predictions


@pytest.mark.parametrize("seed", [1, 2])
def test_the_file_needs_the_exact_order_and_scores_as_pycocotools(files, seed):
    """pycocotools 2.0.11 on the file: every summary number and per-class AP."""
    _, split, dets = _inputs(files, seed)
    truth, predictions = _coco_equal(files, split, dets)
    assert predictions.score_conflicts["100"] and predictions.score_conflicts["none"]
    assert match(truth, predictions, "coco").det_key is not None


@pytest.mark.parametrize("protocol", ["coco", "recall40"])
@pytest.mark.parametrize("seed", [1, 2])
def test_weights_equal_duplicated_images(files, protocol, seed):
    """A weight w scores as w adjacent copies of the image (ids id*10 + copy), whose
    file pycocotools ranks with the copies' ties in image order: the order key's runs
    are pycocotools' ties, repeated as a whole. The duplicated file itself is checked
    against pycocotools 2.0.11 under ``coco``."""
    rng, split, dets = _inputs(files, seed, n_images=10)
    weighted_equals_duplicated(files, rng, split, dets, protocol)


def weighted_equals_duplicated(files, rng, split, dets, protocol):
    """Random weights 0..3 score as the file with each image copied that often, whose
    numbers are checked against pycocotools 2.0.11 under ``coco``."""
    truth, predictions = files.load(split, dets)
    weights = rng.integers(0, 4, truth.n_images)
    by_id = dict(zip(truth.image_ids.tolist(), weights.tolist()))
    weighted = score_records(match(truth, predictions, protocol), protocol, weights=weights)
    dup_split, dup_dets = _duplicate(split, dets, by_id)
    dup_truth, dup_predictions = files.load(dup_split, dup_dets)
    duplicated = evaluate(dup_truth, dup_predictions, protocol, tag_slices=False)
    assert _numbers(weighted) == _numbers(duplicated)
    if protocol == "coco":
        _coco_equal(files, dup_split, dup_dets)


@pytest.mark.parametrize("protocol", ["coco", "recall40"])
@pytest.mark.parametrize(("images_per_shard", "n_groups"), [(5, 3), (7, N_CLASSES)])
def test_class_groups_give_the_whole_run(files, protocol, images_per_shard, n_groups, tmp_path):
    """The platform's path (image shards, class groups, their files, the final
    records file): records field for field (``det_key`` included), scorecard and
    TIDE breakdown bit for bit equal to the whole run."""
    _, split, dets = _inputs(files, 3)
    truth, predictions = files.load(split, dets)
    whole, expected, result, breakdown = whole_and_grouped(
        truth, predictions, protocol, images_per_shard, n_groups, tmp_path
    )
    assert whole.det_key is not None
    assert json.dumps(result) == json.dumps(expected)
    assert json.dumps(breakdown) == json.dumps(error_breakdown(whole, protocol))


def test_tide_base_ap_is_the_scorecards(files):
    """TIDE's base AP is the scorecard's AP50 for every class whose exact order keeps
    float64's order (all but the wrap-around class, which TIDE ranks by float64:
    DEVELOPERS.md)."""
    _, split, dets = _inputs(files, 4)
    truth, predictions = files.load(split, dets)
    records = match(truth, predictions, "coco")
    card = score_records(records, "coco")
    breakdown = error_breakdown(records, "coco")
    wrapped = truth.classes[3]
    for name in truth.classes:
        if name != wrapped:
            expected = card["per_class"][name]["AP50"]
            assert breakdown["per_class"][name]["AP"] == pytest.approx(expected, abs=1e-12), name


def _check_cuts(truth, records, threshold):
    """``at_threshold`` and ``best_f1`` against the detections scoring >= t, counted
    one by one (float64 scores; the definition, common practice)."""
    card = score_records(records, "coco", score_threshold=threshold)
    is_tp, is_ignored = records.outcomes(0, 0)
    kept = records.det_rank < 100
    for k, name in enumerate(truth.classes):
        mine = kept & (records.det_class == k)
        score = records.det_score

        def counted(t, mine=mine, score=score):
            at = mine & (score >= t)
            return int((at & is_tp).sum()), int((at & ~is_tp & ~is_ignored).sum())

        row = card["per_class"][name]
        tp, fp = counted(threshold)
        assert (row["at_threshold"]["tp"], row["at_threshold"]["fp"]) == (tp, fp), name
        n_pos = row["gt"]
        if not n_pos or row["best_f1"] is None:
            continue
        cuts = np.unique(score[mine][np.isfinite(score[mine])])
        f1 = [2 * counted(t)[0] / (sum(counted(t)) + n_pos) for t in cuts]
        assert row["best_f1"]["f1"] == pytest.approx(max(f1), abs=1e-12), name
        assert row["best_f1"]["threshold"] == cuts[::-1][int(np.argmax(f1[::-1]))], name


@pytest.mark.parametrize("threshold", [-1e19, -(2.0**63), 0.5, 6, 8])
def test_cuts_at_a_score_where_int64_wraps(files, threshold):
    """pycocotools accumulates -2**63 first (int64 negation wraps, pycocotools
    2.0.11), so the class's accumulation order is not by float64 score; a cut still
    keeps the detections scoring >= t."""
    box = [[0, 0, 10, 10], [20, 0, 10, 10]]
    split = {
        "images": [{"id": i, "width": 100, "height": 100} for i in (1, 2)],
        "categories": [{"id": 1, "name": "a"}],
        "annotations": [
            {
                "id": 2 * i + j + 1,
                "image_id": i + 1,
                "category_id": 1,
                "bbox": box[j],
                "area": 100,
                "iscrowd": 0,
            }
            for i in range(2)
            for j in range(2)
        ],
    }
    dets = [
        {"image_id": 1, "category_id": 1, "bbox": box[0], "score": -(2**63)},
        {"image_id": 1, "category_id": 1, "bbox": [50, 50, 5, 5], "score": 5},
        {"image_id": 2, "category_id": 1, "bbox": [50, 50, 5, 5], "score": 7},
        {"image_id": 2, "category_id": 1, "bbox": box[1], "score": -(2**63) + 1},
    ]
    truth, predictions = _coco_equal(files, split, dets)
    records = match(truth, predictions, "coco")
    assert records.det_score.tolist() == [-(2.0**63), 7.0, 5.0, -(2.0**63)]
    _check_cuts(truth, records, threshold)


@pytest.mark.parametrize("seed", [4, 5])
def test_cuts_at_a_score_count_the_detections_at_or_above_it(files, seed):
    """The same on the mixed file, where the exact orders keep float64's order."""
    _, split, dets = _inputs(files, seed)
    truth, predictions = files.load(split, dets)
    _check_cuts(truth, match(truth, predictions, "coco"), 0.5)


@pytest.mark.parametrize("low", [0.001, 1])
@pytest.mark.parametrize("reading", ["caption", "mask", "keypoints"])
def test_records_left_out_beyond_the_cap_keep_the_positions(tmp_path, reading, low):
    """An unfit record pycocotools never compares (``uncompared``: ranked beyond the
    cap of 100) is left out of the loaded columns; written second in the file, it
    shifts every later record's position. The exact order (2**60 + i in ascending
    file order: float64 ties them all, pycocotools ranks them in reverse) still lands
    on the right detections: every number equals pycocotools 2.0.11's
    (``test_coco_reference._compare`` runs it on the same two files). The left-out
    record still types its image's list: a float (``low`` 0.001) makes it float64,
    an integer (1) leaves it int64."""
    from .test_coco_reference import _compare
    from .test_uncompared import _BAD, _SPLIT, _bad, _good

    changes = next(c for r, c, _ in _BAD if r == reading)
    dets = [_good(reading, i, B + i) for i in range(100)]
    dets.insert(1, _bad(reading, changes, low))  # loadRes reads its format off the first
    dets += [_good(reading, i, B + i, image=2, category=2) for i in range(3)]
    _compare(tmp_path, _SPLIT, dets)
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "predictions.json", truth)
    assert len(predictions) == 103 and predictions.score_conflicts["100"]
