"""Image weights (multiplicities) and invariances.

Weighted evaluation must equal scoring the explicitly duplicated images, exactly —
the property the paired bootstrap (Efron & Tibshirani, 1993) relies on to resample
without re-matching. Copies are given ids right after the original's, so ties across
images break the same way (images ascending, as pycocotools accumulates). Under the VOC
protocols ties keep file order (the devkit's stable sort), and the rule is that a
weight w repeats each detection *record* w times in place, one per image copy
(``_duplicate_in_place``); the engine documents it in ``MatchRecords._tie_groups``.
"""

import copy

import numpy as np
import pytest

from evaluation.engine import PRESETS, evaluate, match, score_records

from .synthetic import make_detections, make_split


def _scenario(seed, n_images=12):
    rng = np.random.default_rng(seed)
    split = make_split(
        rng,
        n_images=n_images,
        n_classes=3,
        boxes_per_image=5,
        crowd_rate=0.1,
        tags=("night",),
        area_noise=0.2,
    )
    for ann in split["annotations"]:
        ann["difficult"] = int(rng.random() < 0.1)
    detections = make_detections(rng, split, false_per_image=6, duplicate_rate=0.3, score_levels=10)
    return rng, split, detections


def _duplicate(split, detections, weights_by_id):
    """Each image with weight w appears w times, ids id*10 + copy, in place."""
    images, annotations, dets = [], [], []
    next_ann = 1
    for image in sorted(split["images"], key=lambda im: im["id"]):
        for c in range(weights_by_id[image["id"]]):
            new_id = image["id"] * 10 + c
            images.append({**image, "id": new_id})
            for ann in split["annotations"]:
                if ann["image_id"] == image["id"]:
                    annotations.append({**ann, "id": next_ann, "image_id": new_id})
                    next_ann += 1
            dets += [{**d, "image_id": new_id} for d in detections if d["image_id"] == image["id"]]
    return {"images": images, "annotations": annotations, "categories": split["categories"]}, dets


def _duplicate_in_place(split, detections, weights_by_id):
    """The file-order duplicate: each record followed by its copies (ids id*10 + c)."""
    dup_split, _ = _duplicate(split, [], weights_by_id)
    dets = [
        {**d, "image_id": d["image_id"] * 10 + c}
        for d in detections
        for c in range(weights_by_id[d["image_id"]])
    ]
    return dup_split, dets


def _duplicate_for(protocol):
    return _duplicate_in_place if PRESETS[protocol].tie_order == "file" else _duplicate


def _numbers(result):
    """Every number of a scorecard, flattened, for exact comparison."""
    out = dict(result["summary"])
    for name, row in result["per_class"].items():
        for key, value in row.items():
            if key not in ("curve", "at_threshold", "best_f1"):
                out[f"{name}.{key}"] = value
        out[f"{name}.curve"] = row["curve"]
        out[f"{name}.best_f1"] = row["best_f1"]
        out[f"{name}.at_threshold"] = row["at_threshold"]
    return out


@pytest.mark.parametrize("protocol", sorted(PRESETS))
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_weights_equal_duplicated_images_exactly(files, protocol, seed):
    rng, split, detections = _scenario(seed)
    truth, predictions = files.load(split, detections)
    weights = rng.integers(0, 4, truth.n_images)
    by_id = dict(zip(truth.image_ids.tolist(), weights.tolist()))
    weighted = score_records(match(truth, predictions, protocol), protocol, weights=weights)

    dup_split, dup_dets = _duplicate_for(protocol)(split, detections, by_id)
    dup_truth, dup_predictions = files.load(dup_split, dup_dets)
    duplicated = evaluate(dup_truth, dup_predictions, protocol, tag_slices=False)
    assert _numbers(weighted) == _numbers(duplicated)


def test_weight_zero_equals_leaving_the_image_out(files):
    rng, split, detections = _scenario(4)
    truth, predictions = files.load(split, detections)
    weights = np.ones(truth.n_images, np.int64)
    weights[[0, 3]] = 0
    dropped = set(truth.image_ids[[0, 3]].tolist())
    reduced = copy.deepcopy(split)
    reduced["images"] = [im for im in split["images"] if im["id"] not in dropped]
    reduced["annotations"] = [a for a in split["annotations"] if a["image_id"] not in dropped]
    kept = [d for d in detections if d["image_id"] not in dropped]
    a = score_records(match(truth, predictions, "coco"), "coco", weights=weights)
    b = evaluate(*files.load(reduced, kept), "coco", tag_slices=False)
    assert _numbers(a) == _numbers(b)


def test_tag_slice_equals_the_split_cut_to_that_tag(files):
    rng, split, detections = _scenario(5)
    truth, predictions = files.load(split, detections)
    night = {im["id"] for im in split["images"] if "night" in im["tags"]}
    cut = copy.deepcopy(split)
    cut["images"] = [im for im in split["images"] if im["id"] in night]
    cut["annotations"] = [a for a in split["annotations"] if a["image_id"] in night]
    full = evaluate(truth, predictions, "coco")["slices"]["tag"]["night"]
    alone = evaluate(*files.load(cut, [d for d in detections if d["image_id"] in night]), "coco")
    assert full["AP"] == alone["summary"]["AP"]
    assert full["per_class"] == {c: r["AP"] for c, r in alone["per_class"].items()}


def test_halving_every_score_changes_nothing(files):
    """Only the ranking matters; x/2 is exact in floating point and keeps every tie."""
    _, split, detections = _scenario(6)
    halved = [{**d, "score": d["score"] / 2} for d in detections]
    a = evaluate(*files.load(split, detections), "coco")
    b = evaluate(*files.load(split, halved), "coco")
    assert a["summary"] == b["summary"]
    assert {c: r["AP"] for c, r in a["per_class"].items()} == {
        c: r["AP"] for c, r in b["per_class"].items()
    }


def test_order_of_records_in_the_files_changes_nothing(files):
    """With distinct scores, shuffling detections and images changes no number."""
    rng, split, detections = _scenario(7)
    for i, d in enumerate(detections):
        d["score"] = (i + 1) / (len(detections) + 1)
    shuffled_split = {
        **split,
        "images": list(reversed(split["images"])),
        "annotations": [
            split["annotations"][i] for i in rng.permutation(len(split["annotations"]))
        ],
    }
    shuffled = [detections[i] for i in rng.permutation(len(detections))]
    a = evaluate(*files.load(split, detections), "coco")
    b = evaluate(*files.load(shuffled_split, shuffled), "coco")
    assert _numbers(a) == _numbers(b)


def test_negative_or_fractional_weights_are_refused(files):
    _, split, detections = _scenario(8)
    truth, predictions = files.load(split, detections)
    records = match(truth, predictions, "coco")
    from evaluation.engine import InputError

    with pytest.raises(InputError, match="must be >= 0"):
        score_records(records, "coco", weights=-np.ones(truth.n_images, np.int64))
    with pytest.raises(InputError, match="must be integers"):
        score_records(records, "coco", weights=np.full(truth.n_images, 0.5))
    with pytest.raises(InputError, match=f"expected {truth.n_images} image weights"):
        score_records(records, "coco", weights=np.ones(3, np.int64))


@pytest.mark.parametrize("score", [0.7, float("nan")], ids=["0.7", "NaN"])
@pytest.mark.parametrize("protocol", sorted(PRESETS))
def test_ties_inside_one_image_follow_the_copies(files, protocol, score):
    """Two TPs and an FP of one class share a score in one image: with weight 3 the
    duplicated split walks them copy after copy (TP FP TP, TP FP TP, ...), and so must
    the weighted evaluation. NaN scores tie too: pycocotools' stable sorts keep them
    in order, last (red team audit16 F1: each NaN was a run of its own, so the copies
    came TP TP TP, FP FP FP, ...; pycocotools 2.0.11 on the duplicated split below)."""
    split = {
        "images": [{"id": 1, "width": 400, "height": 300}, {"id": 2, "width": 400, "height": 300}],
        "annotations": [
            {
                "id": 1,
                "image_id": 1,
                "category_id": 1,
                "bbox": [10, 10, 50, 50],
                "area": 2500,
                "iscrowd": 0,
            },
            {
                "id": 2,
                "image_id": 1,
                "category_id": 1,
                "bbox": [200, 10, 50, 50],
                "area": 2500,
                "iscrowd": 0,
            },
            {
                "id": 3,
                "image_id": 2,
                "category_id": 1,
                "bbox": [10, 100, 60, 60],
                "area": 3600,
                "iscrowd": 0,
            },
        ],
        "categories": [{"id": 1, "name": "pedestrian"}],
    }
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": [10, 10, 50, 50], "score": score},
        {"image_id": 1, "category_id": 1, "bbox": [300, 200, 40, 40], "score": score},
        {"image_id": 1, "category_id": 1, "bbox": [201, 11, 50, 50], "score": score},
        {"image_id": 2, "category_id": 1, "bbox": [12, 100, 60, 60], "score": 0.8},
        {"image_id": 2, "category_id": 1, "bbox": [300, 10, 30, 30], "score": 0.75},
    ]
    truth, predictions = files.load(split, detections)
    weights = np.array([3, 1])
    weighted = score_records(match(truth, predictions, protocol), protocol, weights=weights)
    dup_split, dup_dets = _duplicate_for(protocol)(split, detections, {1: 3, 2: 1})
    duplicated = evaluate(*files.load(dup_split, dup_dets), protocol, tag_slices=False)
    assert _numbers(weighted) == _numbers(duplicated)
    if protocol == "coco":
        from .conftest import pycocotools_eval

        reference = pycocotools_eval(files.root / "truth.json", files.root / "predictions.json")
        assert weighted["summary"]["AP"] == pytest.approx(reference.stats[0], abs=1e-12)


def test_records_saved_before_tie_orders_load_as_image_order(files, tmp_path):
    """Match records stored by engine 2.0 and earlier have no tie_order: they were all
    accumulated in image order, and load so (re-scoring old records keeps its numbers)."""
    from evaluation.engine import MatchRecords

    _, split, detections = _scenario(9)
    truth, predictions = files.load(split, detections)
    records = match(truth, predictions, "voc")
    path = tmp_path / "new.npz"
    records.save(path)
    assert MatchRecords.load(path).tie_order == "file"
    with np.load(path) as data:
        old = {k: data[k] for k in data.files if k != "tie_order"}
    np.savez_compressed(tmp_path / "old.npz", **old)
    assert MatchRecords.load(tmp_path / "old.npz").tie_order == "image"
