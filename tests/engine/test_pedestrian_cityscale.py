"""``miss-rate-cityscale`` against the city-scale benchmark's evaluation (Zhang et al.,
CVPR 2017): ``eval_MR_multisetup.py`` ``_prepare`` / ``evaluateImg`` / ``accumulate`` /
``summarize`` with the ``loadRes`` of its ``coco.py``, transliterated in
``pedestrian_oracle.cityscale_coco`` (written from the published code's logic).

Random COCO-style files — ``ignore`` keys (0, 1, 2, true, false, 0.5, -0.5),
``iscrowd`` (which it never reads), annotation id 0, a second category (it evaluates
category id 1 only), tied scores, detections below the expanded height range, images
without detections, image ids out of order — are scored by the engine from the files
and by the transliteration from the same parsed JSON, after the project's documented
mapping of its own fields into the script's inputs (``script_input``). Plus a worked
example computed by hand.
"""

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import load_predictions, load_truth
from evaluation.engine.pedestrian import evaluate_setups
from evaluation.engine.pedestrian_setups import CITYSCALE_SETUPS

from .cityscale_checks import setups_as_script, write_files


def _load(root, dataset, results):
    gt, dt = write_files(root, dataset, results)
    truth = load_truth(gt)
    return truth, load_predictions(dt, truth)


def script_input(dataset):
    """The project's ground truth as the script's input (DEVELOPERS.md, "Pedestrian
    setups"): ``height`` is the box's h, ``vis_ratio`` the ``visibility`` (1.0 when not
    given), and each don't-care region an annotation of category 1 with ``ignore: 1``."""
    anns = []
    for a in dataset["annotations"]:
        vis = a.get("visibility")
        anns.append({**a, "height": a["bbox"][3], "vis_ratio": 1.0 if vis is None else vis})
    next_id = max([a["id"] for a in anns], default=0) + 1
    for k, r in enumerate(dataset.get("dont_care", [])):
        h = r["bbox"][3]
        anns.append(
            {
                "id": next_id + k,
                "image_id": r["image_id"],
                "category_id": 1,
                "bbox": r["bbox"],
                "height": h,
                "vis_ratio": 1.0,
                "ignore": 1,
            }
        )
    return {**dataset, "annotations": anns}


def _compare(tmp_path, dataset, results):
    """Per setup: the engine's setup value and miss rates against the script's
    ``summarize`` output (-1 = nothing evaluated = None here). Exact equality."""
    gt, dt = write_files(tmp_path, dataset, results)
    return setups_as_script(load_truth(gt), dt, script_input(dataset), results)


# --- a worked example ------------------------------------------------------------


def _worked_example():
    """Two images. Image 1: A = [0, 0, 40, 100] of annotation id 0; B = [100, 0, 40,
    100] with ``iscrowd: 1``; C = [200, 0, 40, 100] with ``ignore: 1``. Image 2: D = [0,
    0, 40, 100] (id 9), no detection. Detections on image 1: d4 [300, 0, 12, 30] 0.95,
    d1 on A 0.9, d2 on C 0.8, d3 on B 0.7."""
    box = [0.0, 0.0, 40.0, 100.0]
    dataset = {
        "images": [{"id": 1, "width": 640, "height": 480}, {"id": 2, "width": 640, "height": 480}],
        "categories": [{"id": 1, "name": "pedestrian"}],
        "annotations": [
            {"id": 0, "image_id": 1, "category_id": 1, "bbox": box},
            {"id": 7, "image_id": 1, "category_id": 1, "bbox": [100.0, 0, 40, 100], "iscrowd": 1},
            {"id": 8, "image_id": 1, "category_id": 1, "bbox": [200.0, 0, 40, 100], "ignore": 1},
            {"id": 9, "image_id": 2, "category_id": 1, "bbox": box},
        ],
    }
    results = [
        {"image_id": 1, "category_id": 1, "bbox": [300.0, 0, 12, 30], "score": 0.95},
        {"image_id": 1, "category_id": 1, "bbox": box, "score": 0.9},
        {"image_id": 1, "category_id": 1, "bbox": [200.0, 0, 40, 100], "score": 0.8},
        {"image_id": 1, "category_id": 1, "bbox": [100.0, 0, 40, 100], "score": 0.7},
    ]
    return dataset, results


def test_worked_example_by_hand(tmp_path):
    """Reasonable setup, by hand. Counted boxes: A, B (``iscrowd`` is never read by
    ``_prepare``) and D: n = 3; C is an ignore box (its ``ignore`` key). d4 (h = 30 <
    50 / 1.25 = 40) is dropped by the height filter. d1 matches A (IoU 1) but A's id is
    0, so ``dtMatches`` holds 0: a false positive, and A stays taken. d2 matches the
    ignore box C (intersection over d2's own area = 1): ignored. d3 matches B: a true
    positive. In score order d1 (FP), d3 (TP): FPPI = FP / 2 images = 0.5, 0.5; recall
    0, 1/3. ``searchsorted(fppi, ref, 'right') - 1`` is -1 for the seven references
    below 0.5, which reads the last recall 1/3; 0.5623 and 1.0 read index 1, also 1/3.
    Miss rate 2/3 at all nine: LAMR = 2/3.

    The toolbox's reading (``miss-rate``) differs twice: B is a crowd box, so ignored
    (d3 vanishes in it), and ids are not read, so d1 is a true positive: n = 2, recall
    1/2 at FPPI 0 everywhere, LAMR 1/2."""
    dataset, results = _worked_example()
    ours = _compare(tmp_path, dataset, results)
    row = ours["levels"]["reasonable"]["classes"]["pedestrian"]
    assert row["n_gt"] == 3
    assert row["detections"] == {
        "true_positive": 1,
        "false_positive": 1,
        "ignored": 1,
        "outside_height": 1,
    }
    assert row["reference_miss_rate"] == pytest.approx([2 / 3] * 9, abs=1e-15)
    assert row["miss_rate"] == pytest.approx(2 / 3, rel=1e-12)
    truth, predictions = _load(tmp_path, dataset, results)
    toolbox = evaluate_setups(truth, predictions, "miss-rate")["levels"]["reasonable"]
    assert toolbox["miss_rate"] == pytest.approx(0.5, rel=1e-12)


def test_only_category_id_one_is_evaluated(tmp_path):
    """``accumulate`` hard-codes ``catIds = [1]``: with the pedestrians under category
    id 2 the script fills nothing (``summarize`` prints -1), so every setup is None and
    the record says why; the same file with the pedestrians under id 1 (and riders
    under 2) scores the pedestrians only. A category id written as the text "1" is not
    1 (``1 in {1}`` but not ``"1"``)."""
    dataset, results = _worked_example()
    moved = {
        **dataset,
        "categories": [{"id": 2, "name": "pedestrian"}, {"id": 3, "name": "rider"}],
        "annotations": [{**a, "category_id": 2} for a in dataset["annotations"]],
    }
    moved_results = [{**r, "category_id": 2} for r in results]
    ours = _compare(tmp_path, moved, moved_results)
    assert ours["headline"] is None
    assert all(level["classes"] == {} for level in ours["levels"].values())
    truth, predictions = _load(tmp_path, moved, moved_results)
    assert evaluate_setups(truth, predictions, "miss-rate")["headline"] == pytest.approx(0.5)

    from evaluation.engine.level_provenance import level_record

    record = level_record("miss-rate-cityscale", truth, predictions, ours)
    assert record["absent_classes"]["pedestrian"].startswith("not category id 1")

    texts = {
        **dataset,
        "categories": [{"id": "1", "name": "pedestrian"}],
        "annotations": [{**a, "category_id": "1"} for a in dataset["annotations"]],
    }
    text_results = [{**r, "category_id": "1"} for r in results]
    truth, predictions = _load(tmp_path, texts, text_results)
    assert evaluate_setups(truth, predictions, "miss-rate-cityscale")["headline"] is None

    riders = {
        **dataset,
        "categories": [{"id": 1, "name": "pedestrian"}, {"id": 2, "name": "rider"}],
        "annotations": dataset["annotations"]
        + [{"id": 20, "image_id": 2, "category_id": 2, "bbox": [0.0, 0, 40, 100]}],
    }
    ours = _compare(tmp_path, riders, results)
    assert list(ours["levels"]["reasonable"]["classes"]) == ["pedestrian"]
    assert ours["headline"] == pytest.approx(2 / 3, rel=1e-12)


@pytest.mark.parametrize("value, outcome", [(1, "ignored"), (0.5, "false_positive")])
def test_a_fractional_ignore_key_ignores_the_box_but_overlaps_by_iou(tmp_path, value, outcome):
    """``_prepare`` keeps the key's value: 0.5 is truthy, so the box is an ignore box
    (``_ignore = 1``), but ``computeIoU`` passes ``int(0.5) = 0`` as the crowd flag, so
    its overlap is plain IoU. Box [0, 0, 40, 100], detection [20, 0, 10, 100] inside it:
    over the detection's area 1000 / 1000 = 1, IoU 1000 / 4000 = 0.25. ``ignore: 1``:
    the detection is ignored; ``ignore: 0.5``: it matches nothing, a false positive."""
    dataset = {
        "images": [{"id": 1}],
        "categories": [{"id": 1, "name": "pedestrian"}],
        "annotations": [
            {"id": 1, "image_id": 1, "category_id": 1, "bbox": [0.0, 0, 40, 100], "ignore": value},
            {"id": 2, "image_id": 1, "category_id": 1, "bbox": [100.0, 0, 40, 100]},
        ],
    }
    results = [
        {"image_id": 1, "category_id": 1, "bbox": [20.0, 0, 10, 100], "score": 0.9},
        {"image_id": 1, "category_id": 1, "bbox": [100.0, 0, 40, 100], "score": 0.8},
    ]
    ours = _compare(tmp_path, dataset, results)
    detections = ours["levels"]["reasonable"]["classes"]["pedestrian"]["detections"]
    assert detections[outcome] == 1 and detections["true_positive"] == 1


def test_open_ends_are_the_scripts_1e10():
    """``Params.HtRng``/``VisRng`` write the open ends as ``1e5 ** 2``: a box of height
    1e10 is inside, a taller one outside (``_prepare``: ``height > HtRng[1]``); a
    detection is kept while h < 1e10 * 1.25 (``evaluateImg``'s filter)."""
    reasonable = CITYSCALE_SETUPS[0]
    assert reasonable.height == (50.0, 1e10) and reasonable.visibility == (0.65, 1e10)
    inside = reasonable.counts(np.array([1e10, np.nextafter(1e10, math.inf)]), np.ones(2))
    assert inside.tolist() == [True, False]
    kept = reasonable.keeps(np.array([np.nextafter(1.25e10, 0), 1.25e10]), 1.25)
    assert kept.tolist() == [True, False]


# --- random files ------------------------------------------------------------------

_coord = st.integers(0, 12).map(lambda v: v * 10.0)
_height = st.sampled_from([15.0, 19.0, 20.0, 30.0, 39.5, 40.0, 50.0, 60.0, 75.0, 80.0, 93.75])
_vis = st.sampled_from([None, 0.1, 0.2, 0.5, 0.65, 0.8, 1.0])
_aspect = st.sampled_from([0.3, 0.41, 0.6])
#: ``ignore`` values: absent, false/true, 0/1, 2 (truthy, nonzero ``int``: overlap over
#: the detection's area) and fractions (truthy, ``int`` 0: plain IoU).
_ignore = st.sampled_from([None, None, None, 0, 1, True, False, 2, 0.5, -0.5])
_iscrowd = st.sampled_from([None, None, 0, 1])


@st.composite
def _files(draw):
    n_images = draw(st.integers(1, 5))
    image_ids = draw(
        st.lists(st.integers(1, 30), min_size=n_images, max_size=n_images, unique=True)
    )
    n_boxes = draw(st.integers(0, 4 * n_images))
    # unique annotation ids; 0 among them often
    ann_ids = draw(st.lists(st.integers(0, 60), min_size=n_boxes, max_size=n_boxes, unique=True))
    annotations = []
    for ann_id in ann_ids:
        h = draw(_height)
        ann = {
            "id": ann_id,
            "image_id": draw(st.sampled_from(image_ids)),
            "category_id": draw(st.sampled_from([1, 1, 1, 2])),
            "bbox": [draw(_coord), draw(_coord), h * draw(_aspect), h],
        }
        for key, value in (("visibility", draw(_vis)), ("ignore", draw(_ignore))):
            if value is not None:
                ann[key] = value
        crowd = draw(_iscrowd)
        if crowd is not None:
            ann["iscrowd"] = crowd
        annotations.append(ann)
    regions = [
        {"image_id": draw(st.sampled_from(image_ids)), "bbox": [draw(_coord), 0.0, 60.0, 90.0]}
        for _ in range(draw(st.integers(0, 2)))
    ]
    results = []
    for image_id in image_ids:
        own = [a for a in annotations if a["image_id"] == image_id]
        for _ in range(draw(st.integers(0, 6))):  # 0: an image without detections
            if own and draw(st.booleans()):
                x, y, w, h = draw(st.sampled_from(own))["bbox"]
                jitter = draw(st.sampled_from([0.0, 2.0, 5.0, 12.0]))
                narrow = draw(st.sampled_from([1.0, 1.0, 0.3]))  # inside: IoU < 0.5 <= IoA
                box = [x + jitter, y, w * narrow, h + draw(st.sampled_from([0.0, -10.0, 10.0]))]
            else:
                h = draw(_height)
                box = [draw(_coord), draw(_coord), h * draw(_aspect), h]
            results.append(
                {
                    "image_id": image_id,
                    "category_id": draw(st.sampled_from([1, 1, 1, 1, 2])),
                    "bbox": box,
                    "score": draw(st.sampled_from([0.1, 0.3, 0.5, 0.7, 0.9])),  # ties
                }
            )
    order = draw(st.permutations(range(len(results))))  # file order across images
    results = [results[i] for i in order]
    dataset = {
        "images": [{"id": i, "width": 640, "height": 480} for i in image_ids],  # unsorted
        "categories": [{"id": 1, "name": "pedestrian"}, {"id": 2, "name": "rider"}],
        "annotations": annotations,
    }
    if regions:
        dataset["dont_care"] = regions
    return dataset, results


@settings(
    max_examples=400, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(files=_files())
def test_random_files_equal_the_transliteration(tmp_path, files):
    """Every setup's value and nine miss rates equal the transliteration's exactly."""
    dataset, results = files
    if not results:  # loadRes indexes anns[0]: the script cannot read an empty list
        return
    _compare(tmp_path, dataset, results)
