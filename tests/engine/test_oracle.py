"""Every protocol against a slow literal transliteration of its published algorithm
(tests/engine/oracle.py: pycocotools 2.0.11 evaluateImg/accumulate; PASCAL VOC devkit
VOCevaldet.m / VOCap.m; the pedestrian toolbox's bbGt compRoc / dbEval), on random
splits with difficult boxes, crowds, float and integer boxes, and scores tied across
images in an order that is not image order (the files are shuffled)."""

import numpy as np
import pytest

from evaluation.engine import evaluate, get_protocol, match, protocol_from_dict

from . import oracle
from .synthetic import make_detections, make_split


def _random_inputs(files, seed, *, difficult_rate=0.15):
    rng = np.random.default_rng(seed)
    split = make_split(
        rng,
        n_images=int(rng.integers(1, 8)),
        n_classes=int(rng.integers(1, 4)),
        boxes_per_image=float(rng.uniform(0.5, 6)),
        crowd_rate=0.1,
        integer_coords=bool(seed % 2),
        width=200,
        height=150,
    )
    for ann in split["annotations"]:
        ann["difficult"] = int(rng.random() < difficult_rate)
    detections = make_detections(
        rng,
        split,
        false_per_image=float(rng.uniform(0, 8)),
        duplicate_rate=0.4,
        score_levels=int(rng.choice([4, 1000])),
    )
    return files.load(split, detections)


def _per_class_ap(result, classes):
    return np.array(
        [
            np.nan if result["per_class"][c]["AP"] is None else result["per_class"][c]["AP"]
            for c in classes
        ]
    )


@pytest.mark.parametrize("seed", range(12))
@pytest.mark.parametrize("protocol", ["voc07", "voc"])
def test_voc_protocols_follow_the_devkit(files, seed, protocol):
    truth, predictions = _random_inputs(files, seed)
    ours = _per_class_ap(evaluate(truth, predictions, protocol), truth.classes)
    expected = oracle.voc_ap(truth, predictions, eleven_point=protocol == "voc07")
    np.testing.assert_allclose(ours, expected, rtol=0, atol=1e-12)


CUSTOM = {
    "name": "custom-check",
    "base": "coco",
    "iou_thresholds": [0.3, 0.6, 0.9],
    "class_iou_thresholds": {"class1": 0.45},
    "recall_points": [0.0, 0.2, 0.4, 0.6, 0.8, 1.0],
    "max_detections": 3,
}


@pytest.mark.parametrize("seed", range(12))
@pytest.mark.parametrize("spec", ["recall40", CUSTOM], ids=["recall40", "custom"])
def test_greedy_protocols_follow_pycocotools_rules(files, seed, spec):
    truth, predictions = _random_inputs(files, seed)
    protocol = protocol_from_dict(spec) if isinstance(spec, dict) else spec
    result = evaluate(truth, predictions, protocol)
    p = get_protocol(protocol)
    table = p.threshold_table(truth.classes)
    expected = oracle.greedy_ap(
        truth,
        predictions,
        thresholds=list(table),
        recall_points=p.recall_points,
        max_detections=p.max_detections_limit,
        epsilon=p.precision_epsilon,
    )
    # AP of a class = mean over slots (absent classes are NaN in every slot).
    np.testing.assert_allclose(
        _per_class_ap(result, truth.classes), expected.mean(axis=0), rtol=0, atol=1e-12
    )


@pytest.mark.parametrize("seed", range(10))
@pytest.mark.parametrize("protocol", ["coco", "recall40"])
def test_miss_rate_follows_the_pedestrian_toolbox(files, seed, protocol):
    """Log-average miss rate per class against ``oracle.toolbox_miss_rate``, a
    transliteration of Dollár et al.'s toolbox (bbGt compRoc, dbEval). Matching (IoU 0.5
    slot) comes from the engine's match records, which the pycocotools comparisons
    cover; the toolbox's input order is images in order, each image's detections by
    score (stable). Many tied scores (4 levels)."""
    truth, predictions = _random_inputs(files, seed)
    result = evaluate(truth, predictions, protocol)
    records = match(truth, predictions, protocol)
    is_tp, is_ignored = records.outcomes(0, 0)
    for k, name in enumerate(truth.classes):
        rows = np.flatnonzero(records.det_class == k)
        order = rows[
            np.lexsort((records.det_order[rows], -records.det_score[rows], records.det_image[rows]))
        ]
        n_pos = int(records.n_positives(0)[k])
        expected = (
            None
            if n_pos == 0
            else oracle.toolbox_miss_rate(
                records.det_score[order].tolist(),
                is_tp[order].tolist(),
                is_ignored[order].tolist(),
                n_pos,
                truth.n_images,
            )
        )
        got = result["per_class"][name]["miss_rate"]
        if expected is None:
            assert got is None, name
        else:
            assert got == pytest.approx(expected, rel=1e-12, abs=1e-15), name


def test_file_order_ties_are_exercised(files):
    """The random VOC files above do tie across images out of image order: under an
    image-order variant of the protocol some class's AP differs (else the VOC checks
    could not tell the two orders apart)."""
    moved = 0
    for seed in range(12):
        truth, predictions = _random_inputs(files, seed)
        image_order = protocol_from_dict({"name": "v", "base": "voc", "tie_order": "image"})
        a = _per_class_ap(evaluate(truth, predictions, "voc"), truth.classes)
        b = _per_class_ap(evaluate(truth, predictions, image_order), truth.classes)
        moved += int(np.nansum(np.abs(a - b)) > 1e-9)
    assert moved >= 2
