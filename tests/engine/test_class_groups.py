"""Shards scored by class group give the records, scorecard and TIDE breakdown of one
whole run, bit for bit.

The reference is the engine's single-process run, which the other engine tests hold
to pycocotools (test_coco_reference.py), the VOC devkit's rules (test_worked_examples.py)
and tidecv (test_tide.py). Here a split is matched in image shards, each shard's
records cut into class groups, each group merged and scored on its own, and the
groups assembled: every field of the records file written from the groups, every
number of the scorecard and of the error breakdown must equal the whole run's, under
every preset, with scores quantised so that ties cross shard boundaries and class
groups, class-confused detections whose classification fix moves them into another
group, and groups of one class (where a mean over one axis could sum in another order).
"""

import json
import zipfile

import numpy as np
import pytest

from evaluation import image_loo
from evaluation.engine import PRESETS, annotate, match, score_records, shards
from evaluation.engine import class_groups as cg
from evaluation.engine.records import MatchRecords
from evaluation.engine.records_from_groups import write_records
from evaluation.engine.tide import error_breakdown

from .synthetic import make_detections, make_split
from .test_shards import FIELDS, _rows

N_CLASSES = 6


@pytest.fixture(scope="module")
def loaded(tmp_path_factory):
    from evaluation.engine import load_predictions, load_truth

    rng = np.random.default_rng(16)
    split = make_split(rng, n_images=48, n_classes=N_CLASSES, boxes_per_image=5, crowd_rate=0.1)
    dets = make_detections(rng, split, score_levels=6, duplicate_rate=0.3)
    # class confusions: a box found with another class's label (TIDE's class error),
    # some of them landing in another class group
    for ann in rng.choice(split["annotations"], size=len(split["annotations"]) // 3):
        x, y, w, h = ann["bbox"]
        dets.append(
            {
                "image_id": ann["image_id"],
                "category_id": int(ann["category_id"] % N_CLASSES + 1 + rng.integers(0, 2))
                % N_CLASSES
                + 1,
                "bbox": [x + 0.05 * w, y, w, h * 0.95],
                "score": float(rng.integers(1, 7) / 6),
            }
        )
    root = tmp_path_factory.mktemp("class_groups")
    (root / "truth.json").write_text(json.dumps(split))
    (root / "dets.json").write_text(json.dumps(dets))
    truth = load_truth(root / "truth.json")
    return truth, load_predictions(root / "dets.json", truth)


def _grouped(truth, predictions, protocol, images_per_shard, n_groups, tmp_path):
    """The platform's path through files: shards, shard records by group, one scored
    file per group, the final assembly and records file."""
    groups = cg.plan(N_CLASSES, n_groups)
    shard_files = []
    ranges = shards.plan(truth.n_images, images_per_shard)
    for k, piece in enumerate(shards.pieces(truth, predictions, ranges)):
        records = shards.match_shard(*piece, protocol)
        path = tmp_path / f"shard-{k}.npz"
        shard_files.append((path, cg.save_shard_records(path, records, piece[1], groups)))
    tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
    group_files = []
    for j, (lo, hi) in enumerate(groups):
        read = [cg.load_group_part(path, j, digests) for path, digests in shard_files]
        group = cg.merge_group([part for part, _ in read], read[0][1], lo, hi)
        parts = cg.group_parts(group, protocol, tag_masks=tag_masks)
        path = tmp_path / f"group-{j}.npz"
        loo = image_loo.group_members(group.records, protocol, tag_masks, read[0][1]["thresholds"])
        cg.save_group(path, group, parts, lo, read[0][1], extra=loo)
        group_files.append(path)
    result, breakdown = cg.assemble([cg.load_group_parts(p) for p in group_files], protocol)
    totals = cg.totals(group_files)
    counts = shards.PredictionCounts.of(predictions)
    annotate(result, truth, counts, totals, protocol)
    write_records(tmp_path / "records.npz", group_files, truth.n_boxes)
    return result, breakdown, MatchRecords.load(tmp_path / "records.npz")


def _same_records(whole, merged):
    for name in FIELDS:
        a, b = getattr(whole, name), getattr(merged, name)
        if isinstance(a, np.ndarray):
            assert a.dtype == b.dtype, name
            assert a.shape == b.shape, name
            assert a.tobytes() == b.tobytes(), name  # bit for bit, NaNs included
        else:
            assert a == b, name
    for a, b in zip(_rows(whole), _rows(merged)):
        assert a.dtype == b.dtype and a.tobytes() == b.tobytes()


def whole_and_grouped(truth, predictions, protocol, images_per_shard, n_groups, tmp_path):
    """The whole run and the class-group run (``_grouped``) of the same inputs, their
    records field for field the same: the whole run's records and annotated scorecard,
    the grouped run's scorecard and TIDE breakdown."""
    whole = match(truth, predictions, protocol)
    tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
    expected = annotate(
        score_records(whole, protocol, tag_masks=tag_masks), truth, predictions, whole, protocol
    )
    result, breakdown, merged = _grouped(
        truth, predictions, protocol, images_per_shard, n_groups, tmp_path
    )
    _same_records(whole, merged)
    return whole, expected, result, breakdown


@pytest.mark.parametrize("protocol", sorted(PRESETS))
@pytest.mark.parametrize(("images_per_shard", "n_groups"), [(7, 3), (5, N_CLASSES), (48, 1)])
def test_class_groups_give_the_whole_run(loaded, protocol, images_per_shard, n_groups, tmp_path):
    truth, predictions = loaded
    whole, expected, result, breakdown = whole_and_grouped(
        truth, predictions, protocol, images_per_shard, n_groups, tmp_path
    )
    with zipfile.ZipFile(tmp_path / "records.npz") as z:  # uncompressed, as MatchRecords.save
        assert {i.compress_type for i in z.infolist()} == {zipfile.ZIP_STORED}
    # json.dumps writes every float with repr: equal text is equal bits (key order too)
    assert json.dumps(result) == json.dumps(expected)
    assert json.dumps(breakdown) == json.dumps(error_breakdown(whole, protocol))


@pytest.mark.parametrize("protocol", sorted(PRESETS))
@pytest.mark.parametrize(("images_per_shard", "n_groups"), [(7, 3), (5, N_CLASSES)])
def test_the_groups_leave_one_out_file_is_the_whole_runs(
    loaded, protocol, images_per_shard, n_groups, tmp_path
):
    """The per-image list's leave-one-out file joined from the class groups' parts
    (each group computes its classes, the final step streams them member by member)
    holds the same members, byte for byte, as the one-process run's file (every class
    of the whole records at once) — with groups of one class, whose arrays would be
    one column wide. Its reference, ``per_image.leave_one_out``, is held to re-scoring
    with the image's weight 0 (test_per_image.py)."""
    truth, predictions = loaded
    whole = match(truth, predictions, protocol)
    tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
    expected = image_loo.write(
        tmp_path / "whole-loo.npz", image_loo.compute(whole, protocol, tag_masks)
    )
    _grouped(truth, predictions, protocol, images_per_shard, n_groups, tmp_path)
    groups = [tmp_path / f"group-{j}.npz" for j in range(len(cg.plan(N_CLASSES, n_groups)))]
    joined = image_loo.write_joined(tmp_path / "joined-loo.npz", groups)
    assert joined == expected  # every member's name and SHA-256
    with (
        zipfile.ZipFile(tmp_path / "whole-loo.npz") as a,
        zipfile.ZipFile(tmp_path / "joined-loo.npz") as b,
    ):
        assert a.namelist() == b.namelist()
        for name in a.namelist():
            assert a.read(name) == b.read(name), name
    assert len(expected) == 3 * len(whole.area_names) * 3 or protocol != "coco"


def test_over_the_budget_the_groups_store_no_leave_one_out_part(loaded, tmp_path, settings):
    """Past ``BENCHBOOK_LOO_MAX_BYTES`` no group computes its part and the join gives
    None (the list computes on request): the budget is the whole file's size, keys x
    classes x (1 + images) x 8 bytes."""
    truth, predictions = loaded
    n_keys = 3 * 4 * (1 + len(truth.tags()))  # coco: AP, AP50, AP75; 4 sizes; tags
    size = image_loo.planned_bytes(n_keys, N_CLASSES, truth.n_images)
    assert size == n_keys * N_CLASSES * (truth.n_images + 1) * 8
    settings.BENCHBOOK_LOO_MAX_BYTES = size - 1
    _grouped(truth, predictions, "coco", 7, 3, tmp_path)
    groups = [tmp_path / f"group-{j}.npz" for j in range(3)]
    assert image_loo.write_joined(tmp_path / "loo.npz", groups) is None
    settings.BENCHBOOK_LOO_MAX_BYTES = size
    _grouped(truth, predictions, "coco", 7, 3, tmp_path)
    assert image_loo.write_joined(tmp_path / "loo.npz", groups) is not None


def test_the_fixture_crosses_groups_and_shards(loaded):
    """What the module promises happens: class errors whose box is in another group of
    three, and equal scores of one class on images of different 7-image shards."""
    truth, predictions = loaded
    whole = match(truth, predictions, "coco")
    from evaluation.engine.reasons import CLS
    from evaluation.engine.tide import _fixable, moved_detections

    moved = moved_detections(whole, _fixable(whole))
    source = whole.det_class[(whole.det_reason == CLS) & (_fixable(whole) >= 0)]
    group_of = np.repeat(np.arange(3), 2)
    assert len(moved["class"]) > 10
    assert (group_of[moved["class"]] != group_of[source]).sum() > 5
    key = predictions.cls.astype(np.int64) * 100 + np.round(predictions.score * 6).astype(int)
    crossing = [len(set((predictions.image[key == v] // 7).tolist())) > 1 for v in np.unique(key)]
    assert sum(crossing) > 10


def test_a_tampered_group_is_refused(loaded, tmp_path):
    truth, predictions = loaded
    groups = cg.plan(N_CLASSES, 3)
    piece = next(shards.pieces(truth, predictions, shards.plan(truth.n_images, 48)))
    records = shards.match_shard(*piece, "coco")
    digests = cg.save_shard_records(tmp_path / "s.npz", records, piece[1], groups)
    cg.load_group_part(tmp_path / "s.npz", 1, digests)  # as written: accepted
    with pytest.raises(cg.PartMismatch, match="g1 members do not match"):
        cg.load_group_part(tmp_path / "s.npz", 1, {**digests, "g1": "0" * 64})


def test_groups_that_miss_a_box_are_refused(loaded, tmp_path):
    truth, predictions = loaded
    result = _grouped(truth, predictions, "coco", 48, 2, tmp_path)
    assert result[2].n_detections
    with pytest.raises(ValueError, match="every box exactly once"):
        write_records(tmp_path / "r.npz", [tmp_path / "group-0.npz"], truth.n_boxes)


def test_a_weighted_plan_balances_the_detections():
    weights = 1.0 / np.arange(1, 81) ** 0.8  # a few popular classes, a long tail
    groups = cg.plan(80, 8, weights)
    assert groups[0][0] == 0 and groups[-1][1] == 80
    assert all(a[1] == b[0] and a[0] < a[1] for a, b in zip(groups, groups[1:]))
    loads = [weights[lo:hi].sum() for lo, hi in groups]
    assert max(loads) < 1.6 * weights.sum() / 8  # even by class count: 3.7 times
    assert cg.plan(4, 3, [10, 0, 0, 0]) == [(0, 1), (1, 4)]  # one heavy class alone
    assert cg.plan(3, 2, [0, 0, 0]) == cg.plan(3, 2)


def test_plan_covers_every_class_once():
    assert cg.plan(80, 8) == [(k * 10, k * 10 + 10) for k in range(8)]
    assert cg.plan(3, 8) == [(0, 1), (1, 2), (2, 3)]
    assert cg.plan(5, 2) == [(0, 2), (2, 5)] or cg.plan(5, 2) == [(0, 3), (3, 5)]


@pytest.mark.parametrize("protocol", ["coco", "voc"])
def test_shards_and_groups_with_boxes_but_no_detection(protocol, tmp_path):
    """A shard, or a class group's part of one, holding boxes (a crowd region among
    them) and no detection: merged, it is the whole run (it used to index an empty
    array). Every class has boxes in the last images and detections only in the first."""
    from evaluation.engine import load_predictions, load_truth

    images = [{"id": i, "width": 100, "height": 100} for i in range(1, 5)]
    boxes, dets = [], []
    for image in images:
        for c in range(1, N_CLASSES + 1):
            box = [5 + 10 * c, 5 + 5 * image["id"], 12, 15]
            boxes.append(
                {
                    "id": len(boxes) + 1,
                    "image_id": image["id"],
                    "category_id": c,
                    "bbox": box,
                    "area": 180.0,
                    "iscrowd": int(image["id"] == 4 and c == N_CLASSES),
                }
            )
            if image["id"] <= 2 and c != 3:
                dets.append(
                    {
                        "image_id": image["id"],
                        "category_id": c,
                        "bbox": [box[0] + 1, box[1], 12, 15],
                        "score": 0.5 + 0.05 * c,
                    }
                )
    split = {
        "images": images,
        "annotations": boxes,
        "categories": [{"id": c, "name": f"c{c}"} for c in range(1, N_CLASSES + 1)],
    }
    (tmp_path / "truth.json").write_text(json.dumps(split))
    (tmp_path / "dets.json").write_text(json.dumps(dets))
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "dets.json", truth)
    whole = match(truth, predictions, protocol)
    expected = annotate(
        score_records(whole, protocol, tag_masks={}), truth, predictions, whole, protocol
    )
    for images_per_shard, n_groups in [(1, N_CLASSES), (1, 2), (3, 3)]:
        out = tmp_path / f"{images_per_shard}-{n_groups}"
        out.mkdir()
        result, breakdown, merged = _grouped(
            truth, predictions, protocol, images_per_shard, n_groups, out
        )
        _same_records(whole, merged)
        assert json.dumps(result) == json.dumps(expected)
