"""Every protocol against a slow literal transliteration of its published algorithm
(tests/engine/oracle.py: pycocotools 2.0.11 evaluateImg/accumulate; PASCAL VOC devkit
VOCevaldet.m / VOCap.m; the pedestrian toolbox's bbGt compRoc / dbEval), on random
splits with difficult boxes, crowds, float and integer boxes, boxes of negative width
or height (every third seed), and scores tied across images in an order that is not
image order (the files are shuffled)."""

import json

import numpy as np
import pytest

from evaluation.engine import evaluate, get_protocol, protocol_from_dict

from . import oracle
from .synthetic import make_detections, make_split


def _flip_some(rng, boxes, rate):
    """Negative width and/or height on a share of the boxes (corners listed the other
    way round): the references score such files, so the engine must too."""
    for item in boxes:
        if rng.random() < rate:
            x, y, w, h = item["bbox"]
            sides = int(rng.integers(1, 4))
            if sides & 1:
                x, w = x + w, -w
            if sides & 2:
                y, h = y + h, -h
            item["bbox"] = [x, y, w, h]
            if "area" in item:
                item["area"] = w * h  # negative for one flipped side


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
    if seed % 3 == 0:
        _flip_some(rng, split["annotations"], 0.15)
        _flip_some(rng, detections, 0.15)
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
    # bit for bit: voc07 the devkit's running sum ap=ap+p/11 (audit12 F5); voc numpy's
    # sum of VOCap's very terms, its closing (1 - r) * 0 included (audit14 F1)
    np.testing.assert_array_equal(ours, expected)


@pytest.mark.parametrize(
    ("hits", "n_pos"), [(7, 9), (15, 20), (23, 30), (31, 40), (8, 10), (7, 7), (16, 16)]
)
def test_voc_all_point_ap_sums_the_devkits_terms(files, hits, n_pos):
    """``VOCap.m`` sums ``(mrec(i)-mrec(i-1)).*mpre(i)`` over every recall change, the
    step from the final recall to its closing (1, 0) point included (a zero term where
    the final recall is below 1); the common Python port sums that array with
    ``np.sum`` (``oracle.voc_ap``). numpy sums 8 or more terms in partial sums, so
    leaving the zero term out moved the last bit with 7, 15, 23 true positives (red
    team audit14 F1: 0.5517568850902185 against the devkit's 0.5517568850902184).
    Each image holds one box; the first ``hits`` detections (best first) hit theirs,
    the rest miss, and a false one sits between each pair of hits (precision below 1),
    so recall ends below 1 (n_pos > hits) or at 1."""
    split = {
        "images": [{"id": i, "width": 500, "height": 500} for i in range(1, n_pos + 1)],
        "categories": [{"id": 1, "name": "car"}],
        "annotations": [
            {"id": i, "image_id": i, "category_id": 1, "bbox": [10, 10, 40, 40], "area": 1600}
            for i in range(1, n_pos + 1)
        ],
    }
    detections = [
        {
            "image_id": i,
            "category_id": 1,
            "bbox": [10, 10, 40, 40] if i <= hits else [300, 300, 40, 40],
            "score": 1 - i / 100,
        }
        for i in range(1, n_pos + 1)
    ] + [
        {"image_id": i, "category_id": 1, "bbox": [200, 200, 40, 40], "score": 1 - i / 100 - 0.005}
        for i in range(1, hits)
    ]
    truth, predictions = files.load(split, detections)
    ours = _per_class_ap(evaluate(truth, predictions, "voc"), truth.classes)
    expected = oracle.voc_ap(truth, predictions, eleven_point=False)
    np.testing.assert_array_equal(ours, expected)


def test_voc07_ap_is_the_devkits_running_sum():
    """The VOC 2007 devkit adds ``p/11`` point by point (``VOCevaldet.m``, from memory;
    ``tests/engine/oracle.py`` transliterates it): a class whose precision is 1 at
    every recall point gets 1.0000000000000002 there, not numpy's mean 1.0 (red team
    audit12 F5); a precision of 1/3 throughout, the running sum's own value."""
    from evaluation.engine.average_precision import recall_point_mean

    ones = np.ones((1, 11, 1))
    assert recall_point_mean(ones, running=True)[0, 0] == 1.0000000000000002
    assert recall_point_mean(ones)[0, 0] == 1.0
    total = 0.0
    for _ in range(11):
        total = total + (1 / 3) / 11
    p = np.full((1, 11, 1), 1 / 3)
    assert recall_point_mean(p, running=True)[0, 0] == total


NON_FINITE = (float("nan"), float("inf"), -float("inf"))


@pytest.mark.parametrize("seed", range(12))
@pytest.mark.parametrize("protocol", ["voc07", "voc"])
def test_voc_protocols_follow_the_devkit_on_non_finite_values(files, seed, protocol):
    """NaN and infinite scores and box coordinates (as Python's json reads NaN and
    Infinity literals) against the devkit transliteration, whose sort puts a NaN
    confidence last and whose max/min omit NaN, as MATLAB's do."""
    rng = np.random.default_rng(1000 + seed)
    split = make_split(rng, n_images=4, n_classes=2, boxes_per_image=3, width=200, height=150)
    detections = make_detections(rng, split, false_per_image=3, score_levels=4)
    rate = (0.05, 0.2, 0.5)[seed % 3]

    def spoil(values):
        return [NON_FINITE[int(rng.integers(0, 3))] if rng.random() < rate else v for v in values]

    for det in detections:
        det["bbox"] = spoil(det["bbox"])
        (det["score"],) = spoil([det["score"]])
    if seed % 2:
        for ann in split["annotations"]:
            ann["bbox"] = spoil(ann["bbox"])
    truth, predictions = files.load(split, detections)
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
        difficult=p.difficult_ignored,
    )
    # AP of a class = mean over slots (absent classes are NaN in every slot).
    np.testing.assert_allclose(
        _per_class_ap(result, truth.classes), expected.mean(axis=0), rtol=0, atol=1e-12
    )


def _oracle_outcomes(truth, predictions, protocol):
    """Per class ``(scores, tp, ignored, n_pos)`` from the protocol's own reference
    transliteration: the devkit's ``VOCevaldet.m`` (its sorted order) for best-overlap
    matching, pycocotools ``evaluateImg`` (images in id order, each by score) else."""
    p = get_protocol(protocol)
    outcomes = {}
    if p.matching == "best_overlap":
        oracle.voc_ap(truth, predictions, eleven_point=False, outcomes=outcomes)
    else:
        oracle.greedy_ap(
            truth,
            predictions,
            thresholds=list(p.threshold_table(truth.classes)),
            recall_points=(0.0,),
            max_detections=p.max_detections_limit,
            epsilon=p.precision_epsilon,
            outcomes=outcomes,
            difficult=p.difficult_ignored,
        )
    return outcomes


@pytest.mark.parametrize("seed", range(12))
@pytest.mark.parametrize("protocol", ["coco", "recall40", "voc07", "voc"])
def test_miss_rate_follows_the_pedestrian_toolbox(files, seed, protocol):
    """Log-average miss rate per class, under every protocol that reports it, against
    ``oracle.toolbox_miss_rate``, a transliteration of Dollár et al.'s toolbox (bbGt
    compRoc, dbEval), fed with each detection's outcome at slot 0 from the protocol's
    reference transliteration (pycocotools evaluateImg; the VOC devkit's VOCevaldet.m)
    in that reference's order. Nothing comes from the engine's own matching. Many tied
    scores (4 levels), ties across images out of image order, negative sizes."""
    truth, predictions = _random_inputs(files, seed)
    result = evaluate(truth, predictions, protocol)
    outcomes = _oracle_outcomes(truth, predictions, protocol)
    for k, name in enumerate(truth.classes):
        got = result["per_class"][name]["miss_rate"]
        if k not in outcomes or outcomes[k][3] == 0:
            assert got is None, name
            continue
        scores, tp, ignored, n_pos = outcomes[k]
        expected = oracle.toolbox_miss_rate(scores, tp, ignored, n_pos, truth.n_images)
        assert got == pytest.approx(expected, rel=1e-12, abs=1e-15), (name, got, expected)


@pytest.mark.parametrize("protocol", ["voc07", "voc"])
def test_miss_rate_ties_follow_the_toolbox_image_order_under_voc(files, protocol):
    """One box on image 2; a false positive on image 1 and the true positive on image
    2, tied at 0.9. The devkit's stable sort keeps file order for AP, but the miss rate
    is the pedestrian toolbox's (Dollár et al., ``bbGt`` ``compRoc``): images
    concatenated in order, then a stable sort by score, so the FP on image 1 comes
    first whichever record the file lists first (red team audit15 F2: the number moved
    with the order of two records). Hand-worked below, and equal to the toolbox
    transliteration."""
    split = {
        "images": [{"id": 1, "width": 100, "height": 100}, {"id": 2, "width": 100, "height": 100}],
        "annotations": [
            {"id": 1, "image_id": 2, "category_id": 1, "bbox": [10, 10, 20, 20], "area": 400}
        ],
        "categories": [{"id": 1, "name": "pedestrian"}],
    }
    tp_first = [
        {"image_id": 2, "category_id": 1, "bbox": [10, 10, 20, 20], "score": 0.9},
        {"image_id": 1, "category_id": 1, "bbox": [50, 50, 10, 10], "score": 0.9},
    ]
    # Curve points (FPPI, recall): (-inf, 0), (0.5, 0), (0.5, 1). References 10^-2 ..
    # 10^-0.5 (7 of them) are below 0.5: recall 0; 10^-0.25 = 0.56 and 1: recall 1,
    # clamped to 1e-10 before the log. exp((7 log 1 + 2 log 1e-10) / 9).
    hand = float(np.exp(2 * np.log(1e-10) / 9))
    for detections in (tp_first, tp_first[::-1]):
        truth, predictions = files.load(split, detections)
        got = evaluate(truth, predictions, protocol)["per_class"]["pedestrian"]["miss_rate"]
        scores, tp, ignored, n_pos = _oracle_outcomes(truth, predictions, protocol)[0]
        assert tp == [False, True]  # the toolbox's order: image 1 first on the tie
        assert got == pytest.approx(hand, rel=1e-12)
        assert got == pytest.approx(
            oracle.toolbox_miss_rate(scores, tp, ignored, n_pos, truth.n_images), rel=1e-12
        )
    # With the box on image 1 instead, the TP comes first in either file order.
    split["annotations"][0]["image_id"] = 1
    moved = [dict(d, image_id=3 - d["image_id"]) for d in tp_first]
    for detections in (moved, moved[::-1]):
        truth, predictions = files.load(split, detections)
        got = evaluate(truth, predictions, protocol)["per_class"]["pedestrian"]["miss_rate"]
        assert got == pytest.approx(1e-10, rel=1e-9)


def test_miss_rate_counts_the_detections_the_protocol_compares(files):
    """Under ``coco`` only the 100 highest-scoring detections per image are compared
    (pycocotools' ``maxDets``), so the miss rate's curve holds those only, and the
    record says so (red team audit15 F2). 101 false positives at 0.9 and the true
    positive at 0.1 on image 1 of 200: the TP, 102nd, is never compared: miss rate 1
    at every reference point. Under ``voc`` (no cap) it is read: FPPI 101/200 = 0.505
    before it, so the seven points below 0.505 read recall 0 and 10^-0.25, 1 read
    recall 1: exp(2 ln(1e-10) / 9) (Dollár et al.'s rule, hand-worked)."""
    split = {
        "images": [{"id": i, "width": 1000, "height": 1000} for i in range(1, 201)],
        "annotations": [
            {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 20, 20], "area": 400}
        ],
        "categories": [{"id": 1, "name": "pedestrian"}],
    }
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": [500 + i, 500, 5, 5], "score": 0.9}
        for i in range(101)
    ] + [{"image_id": 1, "category_id": 1, "bbox": [10, 10, 20, 20], "score": 0.1}]
    truth, predictions = files.load(split, detections)
    coco = evaluate(truth, predictions, "coco")
    assert coco["per_class"]["pedestrian"]["miss_rate"] == 1.0
    assert "of the 100 per image compared" in coco["protocol_record"]["miss_rate"]
    voc = evaluate(truth, predictions, "voc")
    expected = float(np.exp(2 * np.log(1e-10) / 9))
    assert voc["per_class"]["pedestrian"]["miss_rate"] == pytest.approx(expected, rel=1e-12)
    assert voc["protocol_record"]["miss_rate"].startswith("every detection, in the toolbox")


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


def _every_detection_on_a_difficult_box():
    """Class car: two counted boxes and a difficult one; its only detections (file
    order) land on the difficult box. Class van: one detection on a difficult box,
    then a true positive (prec = [NaN, 1]: the leading NaN omitted)."""
    box, other = [10, 10, 20, 20], [60, 60, 20, 20]
    split = {
        "images": [{"id": 1, "width": 100, "height": 100}],
        "categories": [{"id": 1, "name": "car"}, {"id": 2, "name": "van"}],
        "annotations": [
            {"id": 1, "image_id": 1, "category_id": 1, "bbox": box, "difficult": 1},
            {"id": 2, "image_id": 1, "category_id": 1, "bbox": other},
            {"id": 3, "image_id": 1, "category_id": 1, "bbox": [40, 0, 10, 10]},
            {"id": 4, "image_id": 1, "category_id": 2, "bbox": box, "difficult": 1},
            {"id": 5, "image_id": 1, "category_id": 2, "bbox": other},
        ],
    }
    for ann in split["annotations"]:
        ann.update(area=400, iscrowd=0)
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": box, "score": 0.9},
        {"image_id": 1, "category_id": 1, "bbox": [11, 10, 20, 20], "score": 0.8},
        {"image_id": 1, "category_id": 2, "bbox": box, "score": 0.9},
        {"image_id": 1, "category_id": 2, "bbox": other, "score": 0.5},
    ]
    return split, detections


def test_a_class_whose_every_detection_is_ignored_is_undefined_under_voc07(files):
    """VOC 2007 devkit (``VOCevaldet.m``'s 11-point loop, the transliteration
    ``oracle.voc_ap``): tp = fp = 0 makes prec all 0/0 = NaN and MATLAB's max of NaN
    alone NaN, so car's AP is NaN there: here absent (None) with the reason in the
    record, the mean over van alone, no NaN in the JSON. A leading NaN before a
    counted detection is omitted (van: 1.0). ``voc`` (``VOCap.m``: the envelope's max
    omits NaN) and ``recall40`` (no recall point 0) give car 0."""
    from evaluation.engine.matching import match
    from evaluation.engine.provenance import protocol_record

    truth, predictions = files.load(*_every_detection_on_a_difficult_box())
    expected = oracle.voc_ap(truth, predictions, eleven_point=True)
    assert np.isnan(expected[0]) and expected[1] == pytest.approx(1.0)  # 11 x (1/11)
    result = evaluate(truth, predictions, "voc07")
    np.testing.assert_allclose(_per_class_ap(result, truth.classes), expected, rtol=0, atol=1e-12)
    assert (
        result["summary"]["AP"] == result["per_class"]["van"]["AP"]
        and result["per_class"]["car"]["recall"] == 0.0
    )
    json.dumps(result, allow_nan=False)
    record = protocol_record(
        "voc07", truth, predictions, match(truth, predictions, "voc07"), result
    )
    assert record["averaged_classes"] == ["van"]
    assert "every detection of the class is ignored" in record["absent_classes"]["car"]
    voc = oracle.voc_ap(truth, predictions, eleven_point=False)
    assert voc[0] == 0.0
    np.testing.assert_allclose(
        _per_class_ap(evaluate(truth, predictions, "voc"), truth.classes), voc
    )
    assert evaluate(truth, predictions, "recall40")["per_class"]["car"]["AP"] == 0.0


@pytest.mark.parametrize("seed", range(8))
def test_voc07_follows_the_devkit_where_classes_are_mostly_difficult(files, seed):
    """Small random files, most boxes difficult, few detections: some classes' every
    detection is ignored (NaN in the devkit transliteration ``oracle.voc_ap``, None
    here; 4 such classes over the 8 seeds) and some begin with ignored ones (a
    leading NaN, omitted)."""
    rng = np.random.default_rng(700 + seed)
    split = make_split(rng, n_images=4, n_classes=5, boxes_per_image=3, width=200, height=150)
    for ann in split["annotations"]:
        ann["difficult"] = int(rng.random() < 0.6)
    detections = make_detections(
        rng, split, hit_rate=0.5, false_per_image=0.2, duplicate_rate=0.3, score_levels=3
    )
    truth, predictions = files.load(split, detections)
    result = evaluate(truth, predictions, "voc07")
    json.dumps(result, allow_nan=False)
    expected = oracle.voc_ap(truth, predictions, eleven_point=True)
    np.testing.assert_allclose(_per_class_ap(result, truth.classes), expected, rtol=0, atol=1e-12)
