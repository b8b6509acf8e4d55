"""Keypoints holding booleans, nested lists or big integers, against pycocotools 2.0.11.

``COCO.loadRes`` reads such a file (first result with keypoints, no bbox or
segmentation) by ``x = s[0::3]; y = s[1::3]; x0,x1,y0,y1 = np.min(x), np.max(x),
np.min(y), np.max(y); area = (x1-x0)*(y1-y0); bbox = [x0,y0,x1-x0,y1-y0]`` with numpy's
own rules: booleans among numbers read as 0/1, uniform nested lists reduced whole,
int64 extents wrapping, integers beyond 64 bits kept as Python objects; booleans alone
(``x1 - x0``: TypeError), ragged lists (ValueError) and integers numpy cannot mix
(OverflowError) raise. ``computeIoU`` then reads that bbox through
``np.array(..., dtype=np.double)`` and ``evaluateImg`` compares that area. Each case
runs through pycocotools 2.0.11 (``pycocotools_eval``, numpy's default error state: an
overflow is a warning there): where it scores the file, every summary number and
per-class AP equal (``test_coco_reference._compare``) on every load path; where it
raises, the file is refused naming file, record and field ``keypoints``.
"""

import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth

from .conftest import pycocotools_eval
from .load_paths import every_path_agrees
from .test_coco_reference import _compare
from .test_mask_results import _files
from .test_uncompared import _SPLIT


def _as_pycocotools_runs(tmp_path, detections):
    """pycocotools 2.0.11's stats on ``detections`` under numpy's default error state
    (an int64 overflow only warns there), or the exception it raises."""
    gt, dt = _files(tmp_path, _SPLIT, detections)
    with np.errstate(all="warn"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return pycocotools_eval(gt, dt), gt, dt
        except Exception as e:  # noqa: BLE001 - whatever it raises
            return e, gt, dt


def _agrees(tmp_path, detections, monkeypatch=None):
    """Scored alike, or refused where pycocotools raises; the scored load's columns."""
    reference, gt, dt = _as_pycocotools_runs(tmp_path, detections)
    truth = load_truth(gt)
    if isinstance(reference, Exception):
        with pytest.raises(InputError) as error:
            load_predictions(dt, truth)
        assert error.value.field == "keypoints" and str(dt) in str(error.value)
        return None
    with np.errstate(all="ignore"):  # pycocotools' own run in _compare may overflow
        _compare(tmp_path, _SPLIT, detections)
    whole = load_predictions(dt, truth)
    if monkeypatch is not None:
        every_path_agrees(tmp_path, monkeypatch, dt, truth, whole, 300)
    return whole


def _file(kp, n_more=2):
    """A readable first result, ``kp`` on a detection near truth box 1, more after."""
    out = [{"image_id": 1, "category_id": 1, "score": 0.9, "keypoints": [2, 3, 2, 12, 11, 2]}]
    out.append({"image_id": 1, "category_id": 1, "score": 0.8, "keypoints": kp})
    for i in range(n_more):
        x, y = 20 + i, 5 + i
        kp = [x, y, 2, x + 12, y + 9, 1]
        out.append({"image_id": 1 + i % 2, "category_id": 1 + i % 2, "score": 0.5, "keypoints": kp})
    return out


# (keypoints of the second result, its bbox and area in pycocotools 2.0.11 — from
# running it —, or the exception its loadRes raises)
_WORKED = [
    # booleans among integers: int64, True as 1
    ([True, 3, 2, 12, False, 2], [1, 0, 11, 3], 33, None),
    # booleans among floats: float64
    ([True, 3.5, 2, 12.5, False, 2], [1.0, 0.0, 11.5, 3.5], 40.25, None),
    # uniform nested lists: np.min over every entry
    ([[1, 2], 3, 2, [5, 6], 4, 1], [1, 3, 5, 1], 5, None),
    ([[True, 4], [3, 2], 2, [12, 0], [9, 9], 1], [0, 2, 12, 7], 84, None),
    # big integers in int64: exact, and the area wraps modulo 2^64
    ([2**40, 3, 2, 12, 11, 2], [12, 3, 2**40 - 12, 8], (2**40 - 12) * 8, None),
    ([0, 0, 2, 2**33, 2**33, 1], [0, 0, 2**33, 2**33], 0, None),  # 2^66 wraps to 0
    ([2**62, 3, 2, -(2**62), 4, 1], [-(2**62), 3, -(2**63), 1], -(2**63), None),
    # beyond int64, all non-negative with small ones: numpy makes float64
    ([2**63, 3, 2, 1, 4, 1], [1.0, 3, 2.0**63 - 1, 1], 2.0**63 - 1, None),
    # beyond 64 bits: an object array of Python ints (a boolean x0 stays True)
    ([2**70, 2**70, 2, 5, 1, 1], [5, 1, 2**70 - 5, 2**70 - 1], (2**70 - 5) * (2**70 - 1), None),
    (
        [True, 2**70, 2, 2**70, 7, 1],
        [True, 7, 2**70 - 1, 2**70 - 7],
        (2**70 - 1) * (2**70 - 7),
        None,
    ),
    ([2**70, 3, 2, 1.5, 4, 1], [1.5, 3, float(2**70 - 1.5), 1], float(2**70 - 1.5), None),
    # what numpy raises on
    ([True, True, 2, False, True, 1], None, None, TypeError),  # bool subtract
    ([[1, 2], 3, 2, [5], 4, 1], None, None, ValueError),  # ragged
    ([-1, 3, 2, 2**64, 4, 1], None, None, OverflowError),  # object array: int - np.int64
    ([True, 3, 2, 2**70, 4, 1], None, None, OverflowError),  # Python int * np.int64
]


@pytest.mark.parametrize(("kp", "bbox", "area", "raises"), _WORKED)
def test_worked_cases_score_or_refuse_as_pycocotools(tmp_path, kp, bbox, area, raises):
    """Each value as pycocotools 2.0.11 reads it (its ``loadRes`` bbox and area are
    checked against the table), the file's numbers equal; or both refuse."""
    reference, gt, dt = _as_pycocotools_runs(tmp_path, _file(kp))
    if raises is not None:
        assert isinstance(reference, raises)
        with pytest.raises(InputError) as error:
            load_predictions(dt, load_truth(gt))
        assert (error.value.record, error.value.field) == ("record 1", "keypoints")
        return
    ann = reference.cocoDt.anns[2]
    assert ann["bbox"] == bbox and ann["area"] == area
    predictions = _agrees(tmp_path, _file(kp))
    assert predictions.boxes[1].tolist() == np.array(ann["bbox"], dtype=np.double).tolist()
    assert predictions.area[1] == float(area)
    assert predictions.box_counts["keypoint_area"] == len(predictions)


def test_a_wrapped_extent_on_every_load_path(tmp_path, monkeypatch):
    """Wrapped int64 extents, booleans, nested lists and 70-bit integers on one file:
    whole, cached, sliced, validated first and streamed pieces give the same columns,
    scored as pycocotools 2.0.11 scores the file."""
    detections = _file([2**62, 3, 2, -(2**62), 4, 1], n_more=4)
    detections += _file([True, 3, 2, 12, False, 2], 0)[1:]
    detections += _file([[1, 2], 3, 2, [5, 6], 4, 1], 0)[1:]
    detections += _file([2**70, 2**70, 2, 5, 1, 1], 0)[1:]
    assert _agrees(tmp_path, detections, monkeypatch) is not None


_value = st.one_of(
    st.integers(-40, 60),
    st.floats(-40, 60, allow_nan=False),
    st.booleans(),
    st.integers(2**29, 2**45),
    st.sampled_from([2**31, 2**33, 2**62, -(2**62), 2**63 - 1, 2**63, 2**64 - 1, 2**70]),
    st.lists(st.integers(-5, 40), min_size=2, max_size=2),
)


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(st.lists(st.lists(_value, min_size=2, max_size=9), min_size=1, max_size=8))
def test_random_keypoint_values_score_or_refuse_as_pycocotools(tmp_path, odd):
    """Random keypoint lists of numbers, booleans, integers up to 2^70 and pairs: every
    summary number and per-class AP equal pycocotools 2.0.11's, or refused where it
    raises."""
    detections = _file([2, 3, 2, 12, 11, 2], n_more=2)
    for i, kp in enumerate(odd):
        record = {"image_id": 1 + i % 2, "category_id": 1 + i % 2, "keypoints": kp}
        detections.append({**record, "score": 0.85 - 0.1 * i})
    event("scored" if _agrees(tmp_path, detections) is not None else "refused")
