"""Results read as masks whose segmentation is a list of one RLE mask with a bbox,
against pycocotools 2.0.11.

``loadRes`` gives such a result ``area = maskUtils.area([rle])``, an array of one
uint32, and keeps its bbox. ``computeIoU`` reads the bbox; ``evaluateImg`` reads
``d['area'] < aRng[0] or d['area'] > aRng[1]`` of the first 100 detections of an image
and class (an array of one reads as its number) and joins them with ``np.array``: a
group whose compared detections are all such lists scores as if each area were the
mask's number; one holding a single mask beside them raises ValueError (inhomogeneous
shape). Each case runs through pycocotools 2.0.11 (``pycocotools_eval``): where it
scores the file, every summary number and per-class AP equal
(``test_coco_reference._compare``) on every load path; where it raises, the file is
refused naming file, record and field ``segmentation``.
"""

import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.loaders import uncompared

from .conftest import pycocotools_eval
from .load_paths import every_path_agrees
from .test_coco_reference import _compare
from .test_mask_results import _files
from .test_uncompared import _SPLIT, _good


def _listed(i, score, image=1, category=1):
    """A list of one mask near a truth box, with a bbox of its own (unlike the mask's:
    computeIoU reads the bbox, the size ranges the mask's area)."""
    record = _good("mask", i, score, image, category)
    record["segmentation"] = [record["segmentation"]]
    record["bbox"] = [2 + i % 7, 3 + i % 5, 10 + i % 3, 8]
    return record


def _scores(tmp_path, detections, monkeypatch=None):
    """Scored as pycocotools 2.0.11 scores the file; with ``monkeypatch``, every load
    path gives the whole load's columns and counts."""
    _compare(tmp_path, _SPLIT, detections)
    gt, dt = _files(tmp_path, _SPLIT, detections)
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    if monkeypatch is not None:
        every_path_agrees(tmp_path, monkeypatch, dt, truth, whole, 400)
    return whole


def _refused(tmp_path, detections, record):
    gt, dt = _files(tmp_path, _SPLIT, detections)
    with pytest.raises(ValueError):  # evaluateImg's np.array of mixed shapes
        pycocotools_eval(gt, dt)
    with pytest.raises(InputError) as error:
        load_predictions(dt, load_truth(gt))
    assert (error.value.record, error.value.field) == (f"record {record}", "segmentation")
    assert str(dt) in str(error.value)


def test_a_group_of_lists_scores_as_pycocotools(tmp_path, monkeypatch):
    """Image 1, class car: every detection a list of one mask with a bbox (the first
    result, a single mask of image 2, makes the file one of masks): scored, with the
    given boxes and the masks' areas (80 each), on every load path."""
    detections = [_good("mask", 0, 0.9, 2, 2), *[_listed(i, 0.8 - i / 10) for i in range(5)]]
    predictions = _scores(tmp_path, detections, monkeypatch)
    assert predictions.boxes[1:].tolist() == [d["bbox"] for d in detections[1:]]
    assert predictions.area.tolist() == [80.0] * 6
    assert uncompared.COUNT not in predictions.box_counts


def test_a_group_without_truth_scores_as_pycocotools(tmp_path):
    """Image 2, class car holds no truth: the lists are false positives, as there."""
    detections = [_good("mask", 0, 0.9, 2, 2), _listed(0, 0.8, 2, 1), _listed(1, 0.7, 2, 1)]
    _scores(tmp_path, detections)


@pytest.mark.parametrize("single_first", [True, False])
def test_beside_a_single_mask_it_is_refused(tmp_path, single_first):
    """A single mask compared in the same image and class: pycocotools 2.0.11 raises
    ValueError; refused naming the list (record 2)."""
    pair = [_good("mask", 1, 0.8), _listed(2, 0.7)]
    if not single_first:
        pair[0]["score"], pair[1]["score"] = 0.7, 0.8
    _refused(tmp_path, [_good("mask", 0, 0.9, 2, 2), *pair], record=2)


def test_beyond_the_cap_beside_single_masks_it_scores(tmp_path, monkeypatch):
    """100 single masks and a list ranked 101st: pycocotools 2.0.11 never reads its
    area; the file scores, the list loaded (its box and area are never compared)."""
    flood = [_good("mask", i, 0.5 - i * 1e-4) for i in range(100)]
    predictions = _scores(tmp_path, [*flood, _listed(3, 0.001)], monkeypatch)
    assert len(predictions) == 101


def test_a_single_mask_beyond_the_cap_of_lists_scores(tmp_path, monkeypatch):
    """100 lists and a single mask ranked 101st: scored, as there."""
    flood = [_listed(i, 0.5 - i * 1e-4) for i in range(100)]
    _scores(tmp_path, [_good("mask", 0, 0.9, 2, 2), *flood, _good("mask", 3, 0.001)], monkeypatch)


def test_exact_integer_scores_decide_the_cap(tmp_path):
    """Scores 2**60 + k (pycocotools 2.0.11 ranks Python ints exactly): a list written
    first with the smallest score ranks 101st there and is never compared beside the
    100 single masks (scored); float64 would tie them all and compare it first."""
    big = 2**60
    detections = [_good("mask", 0, 0.9, 2, 2), _listed(0, big)]
    detections += [_good("mask", k, big + 1 + k) for k in range(100)]
    as_floats = [{**d, "score": float(d["score"])} for d in detections]
    gt, dt = _files(tmp_path, _SPLIT, as_floats)
    with pytest.raises(ValueError):
        pycocotools_eval(gt, dt)
    predictions = _scores(tmp_path, detections)
    assert len(predictions) == 102


_kind = st.sampled_from(["single", "list", "list", "list"])


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    st.lists(
        st.tuples(st.sampled_from([(1, 1), (2, 1), (1, 2)]), _kind, st.integers(0, 9)),
        min_size=1,
        max_size=14,
    )
)
def test_random_groups_score_or_refuse_as_pycocotools(tmp_path, plan):
    """Random groups of single masks and lists of one (ties included): every summary
    number and per-class AP equal pycocotools 2.0.11's, or refused where it raises."""
    detections = [_good("mask", 0, 0.95, 2, 2)]
    for i, ((image, category), kind, score) in enumerate(plan):
        make = _listed if kind == "list" else (lambda *a: _good("mask", *a))
        detections.append(make(i, score / 10, image, category))
    gt, dt = _files(tmp_path, _SPLIT, detections)
    try:
        pycocotools_eval(gt, dt)
    except ValueError:
        event("refused")
        with pytest.raises(InputError) as error:
            load_predictions(dt, load_truth(gt))
        assert error.value.field == "segmentation"
        return
    event("scored")
    _scores(tmp_path, detections)
