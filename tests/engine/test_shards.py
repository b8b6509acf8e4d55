"""Image shards merged give the records and the numbers of one whole run, bit for bit.

The reference here is the engine's own single-process run, which the other engine
tests hold to pycocotools (test_coco_reference.py) and the VOC devkit's rules
(test_worked_examples.py, test_protocols.py): a sharded run must not differ from it
in any bit of any number, under every preset the platform runs and the others.
Ties are forced across shard boundaries: scores are quantised to 7 levels, so equal
scores of one class sit on images of different shards, where the tie rule (image id
under coco/recall40, file position under voc/voc07) decides their order.
"""

import dataclasses
import json

import numpy as np
import pytest

from evaluation.engine import PRESETS, annotate, match, score_records, shards
from evaluation.engine.records import MatchRecords

from .synthetic import make_detections, make_split

FIELDS = [
    name
    for name in MatchRecords.__dataclass_fields__
    if not name.startswith("_") and not name.startswith("match_")
]


@pytest.fixture(scope="module")
def loaded(tmp_path_factory):
    from evaluation.engine import load_predictions, load_truth

    rng = np.random.default_rng(15)
    split = make_split(rng, n_images=60, n_classes=4, boxes_per_image=4, crowd_rate=0.1)
    dets = make_detections(rng, split, score_levels=7, duplicate_rate=0.4)
    root = tmp_path_factory.mktemp("shards")
    (root / "truth.json").write_text(json.dumps(split))
    (root / "dets.json").write_text(json.dumps(dets))
    truth = load_truth(root / "truth.json")
    return truth, load_predictions(root / "dets.json", truth)


def _sharded(truth, predictions, protocol, images_per_shard, tmp_path):
    ranges = shards.plan(truth.n_images, images_per_shard)
    parts = []
    for k, piece in enumerate(shards.pieces(truth, predictions, ranges)):
        path = tmp_path / f"piece-{k}.npz"
        shards.save_piece(path, *piece)  # through the files a worker would read
        sliced_truth, box_index, sliced, positions = shards.load_piece(path)
        records = shards.match_shard(sliced_truth, box_index, sliced, positions, protocol)
        shards.save_shard_records(tmp_path / f"records-{k}.npz", records, box_index)
        parts.append(shards.load_shard_records(tmp_path / f"records-{k}.npz"))
    return shards.merge(parts, truth.n_boxes), len(ranges)


def _rows(records):
    rows = np.lexsort((records.match_det, records.match_config))
    return [getattr(records, f"match_{n}")[rows] for n in ("config", "det", "box", "iou")]


def _scorecard(records, truth, predictions, protocol):
    tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
    result = score_records(records, protocol, tag_masks=tag_masks)
    return json.dumps(annotate(result, truth, predictions, records, protocol), sort_keys=True)


@pytest.mark.parametrize("protocol", sorted(PRESETS))
@pytest.mark.parametrize("images_per_shard", [1, 7, 60])
def test_merged_shards_equal_the_whole_run(loaded, protocol, images_per_shard, tmp_path):
    truth, predictions = loaded
    whole = match(truth, predictions, protocol)
    merged, n_shards = _sharded(truth, predictions, protocol, images_per_shard, tmp_path)
    assert n_shards == -(-60 // images_per_shard)
    for name in FIELDS:
        a, b = getattr(whole, name), getattr(merged, name)
        if isinstance(a, np.ndarray):
            assert a.dtype == b.dtype, name
            assert a.tobytes() == b.tobytes(), name  # bit for bit, NaNs included
        else:
            assert a == b, name
    for a, b in zip(_rows(whole), _rows(merged)):
        assert a.dtype == b.dtype and a.tobytes() == b.tobytes()
    counts = shards.PredictionCounts.of(predictions)
    assert _scorecard(merged, truth, counts, protocol) == _scorecard(
        whole, truth, predictions, protocol
    )


def test_ties_do_cross_shard_boundaries(loaded):
    """The fixture does what the module promises: some class has one score on images
    of two different 7-image shards."""
    truth, predictions = loaded
    shard_of = predictions.image // 7
    crossing = sum(len(set(shard_of[g].tolist())) > 1 for g in _groups(predictions).values())
    assert crossing > 10


def _groups(predictions):
    groups = {}
    for i, key in enumerate(zip(predictions.cls.tolist(), predictions.score.tolist())):
        groups.setdefault(key, []).append(i)
    return {k: np.array(v) for k, v in groups.items()}


def test_an_empty_shard_and_a_shard_without_detections_merge(loaded, tmp_path):
    truth, predictions = loaded
    keep = predictions.image >= 20  # images 0-19: boxes, no detections
    fewer = dataclasses.replace(
        predictions,
        image=predictions.image[keep],
        cls=predictions.cls[keep],
        boxes=predictions.boxes[keep],
        score=predictions.score[keep],
    )
    whole = match(truth, fewer, "coco")
    merged, _ = _sharded(truth, fewer, "coco", 10, tmp_path)
    assert merged.gt_reason.tobytes() == whole.gt_reason.tobytes()
    assert merged.det_order.tobytes() == whole.det_order.tobytes()


def test_merge_refuses_shards_that_miss_or_repeat_boxes(loaded, tmp_path):
    truth, predictions = loaded
    ranges = shards.plan(truth.n_images, 30)
    parts = [
        (shards.match_shard(t, b, p, pos, "coco"), b)
        for t, b, p, pos in shards.pieces(truth, predictions, ranges)
    ]
    with pytest.raises(ValueError, match="not exactly one"):
        shards.merge(parts[:1], truth.n_boxes)
    with pytest.raises(ValueError, match="not exactly one"):
        shards.merge(parts + parts[:1], truth.n_boxes)
    with pytest.raises(ValueError, match="in order of their runs of images"):
        shards.merge(parts[::-1], truth.n_boxes)
    other = (
        shards.match_shard(*next(shards.pieces(truth, predictions, ranges)), "voc"),
        parts[0][1],
    )
    with pytest.raises(ValueError, match="different protocols"):
        shards.merge([other, parts[1]], truth.n_boxes)


def test_plan_covers_every_image_once():
    assert shards.plan(10, 4) == [(0, 4), (4, 8), (8, 10)]
    assert shards.plan(0, 4) == [(0, 0)]


@pytest.mark.parametrize("protocol", ["coco", "voc"])
def test_non_finite_scores_merge_in_the_whole_runs_order(loaded, protocol, tmp_path):
    """NaN scores rank last and infinite ones first (pycocotools reads them, see
    test_coco_reference.py); equal NaNs on images of several shards keep the tie rule."""
    truth, predictions = loaded
    score = predictions.score.copy()
    score[::7], score[3::11], score[5::13] = np.nan, np.inf, -np.inf
    odd = dataclasses.replace(predictions, score=score)
    with np.errstate(invalid="ignore", over="ignore"):
        whole = match(truth, odd, protocol)
        merged, _ = _sharded(truth, odd, protocol, 7, tmp_path)
    for name in FIELDS:
        a, b = getattr(whole, name), getattr(merged, name)
        if isinstance(a, np.ndarray):
            assert a.tobytes() == b.tobytes(), name
