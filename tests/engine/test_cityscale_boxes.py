"""Integers beyond float64's range in boxes under ``miss-rate-cityscale``: refused
(file, record, ``bbox``) exactly where the CityPersons script raises, scored as it
scores them elsewhere (``evaluation.engine.cityscale_boxes``).

Source: the published ``eval_MR_multisetup.py`` and its ``coco.py`` (cvgroup-njust/
CityPersons), their logic transliterated in ``pedestrian_oracle.cityscale_coco`` and run
per setup as ``eval_demo.py`` does (``cityscale_script``): ``loadRes`` computes ``x + w``,
``y + h`` and ``w * h`` of every result; ``computeIoU`` (only where a detection is left
after the cap and the height filter) runs ``iou``, which (from memory) takes
``np.asarray`` of the boxes and computes in Python. Python's ``json`` keeps such an
integer exact; wherever it meets a float (or a numpy integer) it raises OverflowError
(common practice: the language's int-to-float conversion).
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.pedestrian import evaluate_setups

from . import pedestrian_oracle
from .test_cityscale_raises import SETUPS, _dataset

HUGE = 10**400  # beyond float64's range: the engine reads it as infinite


def _ann(k, bbox, image_id=1, category_id=1, ignore=0):
    return {
        "id": k,
        "image_id": image_id,
        "category_id": category_id,
        "bbox": bbox,
        "height": bbox[3],
        "vis_ratio": 1.0,
        "ignore": ignore,
    }


def _det(bbox, score=0.9, image_id=1, category_id=1):
    return {"image_id": image_id, "category_id": category_id, "bbox": bbox, "score": score}


def _write(tmp_path, annotations, results, images=(1, 2), categories=(1, 2)):
    gt, dt = tmp_path / "gt.json", tmp_path / "dt.json"
    gt.write_text(json.dumps(_dataset(annotations, images, categories)))
    dt.write_text(json.dumps(results))
    return gt, dt


def _script(gt, dt):
    try:
        with np.errstate(all="ignore"):  # the script runs under numpy's defaults
            return pedestrian_oracle.cityscale_script(
                json.loads(gt.read_text()), json.loads(dt.read_text())
            )
    except (TypeError, ValueError, OverflowError, ZeroDivisionError) as error:
        return error


def _agree(gt, dt, record=None):
    """Refused where the script raises on a box (naming ``record``, field ``bbox``),
    else the same four setups."""
    reference = _script(gt, dt)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    if isinstance(reference, Exception):
        assert isinstance(reference, (OverflowError, ZeroDivisionError)), reference
        with pytest.raises(InputError) as e:
            evaluate_setups(truth, predictions, "miss-rate-cityscale")
        assert e.value.field == "bbox", str(e.value)
        if record is not None:
            assert e.value.record == record, str(e.value)
        return e.value
    try:
        ours = evaluate_setups(truth, predictions, "miss-rate-cityscale")
    except InputError as e:  # the script scores, exactly: refused where we would differ
        assert "numbers would differ" in str(e) and e.field == "bbox", str(e)
        _holds_huge(gt, dt, e.record)
        return e
    for setup, (mean_s, mrs) in zip(SETUPS, reference):
        level = ours["levels"][setup]
        if mrs is None:
            assert level["miss_rate"] is None, setup
        else:
            assert level["miss_rate"] == pytest.approx(mean_s, abs=1e-12), setup
    return ours


def _holds_huge(gt, dt, record):
    """The record named holds a wide integer in its box (2**26 and up: a product of
    two reaches float64's 2**52 exact limit; common practice, IEEE 754 doubles)."""
    if record.startswith("record "):
        bbox = json.loads(dt.read_text())[int(record.split()[1])]["bbox"]
    else:
        bbox = json.loads(gt.read_text())["annotations"][int(record[12:-1])]["bbox"]
    assert any(type(v) is int and abs(v) >= 2**26 for v in bbox), (record, bbox)


def test_a_box_the_script_computes_exactly_and_we_cannot_is_refused(tmp_path):
    """Both boxes at x = 10**400 (integers), 41 wide: the script's Python integers give
    the overlap 41 * 30 / 4100 (a false positive); this engine's infinities give NaN,
    which the script's own comparisons would match. Refused (a known limit), naming the
    detection; the same file with 1e400 (an infinity for the script too) is scored."""
    annotations = [_ann(1, [HUGE, 0.0, 41, 100])]
    gt, dt = _write(tmp_path, annotations, [_det([HUGE, 0.0, 41, 30.0])])
    assert not isinstance(_script(gt, dt), Exception)
    error = _agree(gt, dt)
    assert isinstance(error, InputError) and error.record == "record 0"
    dt.write_text(dt.read_text().replace(str(HUGE), "1e400"))
    gt.write_text(gt.read_text().replace(str(HUGE), "1e400"))
    assert not isinstance(_agree(gt, dt), InputError)


# (annotations, results, what the script raises on) — read off the transliteration's
# run; None: it scores the file.
GT = [0.0, 0.0, 41.0, 100.0]
CASES = {
    # loadRes: 0.5 + HUGE (x + w) raises for every result, whatever its class
    "loadRes with a float partner": (
        [_ann(1, GT)],
        [_det([0.5, 0, HUGE, 100], category_id=2)],
        "record 0",
    ),
    # loadRes' ints add exactly; iou: the integer array is an object array, the ground
    # truth float64: min(HUGE + 41, numpy 41.0) converts it
    "iou: a detection's x against a float box": (
        [_ann(1, GT)],
        [_det([HUGE, 0, 41, 100])],
        "record 0",
    ),
    # both integer: an int64 array meets the Python integer (numpy cannot convert it)
    "iou: integers on both sides": (
        [_ann(1, [0, 0, 41, 100])],
        [_det([HUGE, 0, 41, 100])],
        "record 0",
    ),
    # the ground truth's box: gx2 = HUGE + 41 exact, then min() against numpy's float
    "iou: an annotation's x": ([_ann(1, [HUGE, 0, 41, 100])], [_det(GT)], "annotations[0]"),
    # a detection 100 * HUGE tall is outside every setup's filter: computeIoU never runs
    "the height filter drops it": ([_ann(1, GT)], [_det([0, 0, 41, HUGE]), _det(GT, 0.5)], None),
    # an image without a detection of the class: computeIoU never runs
    "no detection on its image": (
        [_ann(1, [HUGE, 0, 41, 100], image_id=2), _ann(2, GT)],
        [_det(GT)],
        None,
    ),
    # category 2 is evaluated too (accumulate reads 1 only)
    "category 2": (
        [_ann(1, GT), _ann(2, [HUGE, 0, 41, 100], category_id=2)],
        [_det(GT), _det(GT, category_id=2)],
        "annotations[1]",
    ),
    # an int(ignore) that raises comes first within its image and category
    "a NaN ignore first": (
        [_ann(1, GT, ignore=float("nan"))],
        [_det([HUGE, 0, 41, 100])],
        "annotations[0]",
    ),
}


@pytest.mark.parametrize("case", CASES)
def test_worked_cases_against_the_script(tmp_path, case):
    annotations, results, record = CASES[case]
    gt, dt = _write(tmp_path, annotations, results)
    reference = _script(gt, dt)
    assert isinstance(reference, Exception) is (record is not None)
    if case == "a NaN ignore first":
        assert isinstance(reference, ValueError)
        truth = load_truth(gt)
        with pytest.raises(InputError) as e:
            evaluate_setups(truth, load_predictions(dt, truth), "miss-rate-cityscale")
        assert (e.value.record, e.value.field) == (record, "ignore")
        return
    _agree(gt, dt, record)


def test_the_first_setup_and_pair_in_the_scripts_order_is_named(tmp_path):
    """Image 2's detection (record 0, written first) is 30 px tall: kept only in `all`;
    image 1's (record 1) in every setup: setup 0 raises on record 1."""
    annotations = [_ann(1, GT), _ann(2, GT, image_id=2)]
    results = [_det([HUGE, 0, 12, 30], image_id=2), _det([HUGE, 0, 41, 100])]
    _agree(*_write(tmp_path, annotations, results), "record 1")


@st.composite
def _files(draw):
    def box():
        x, y = draw(st.sampled_from([0.0, 0, 10.0, 2**70])), draw(st.sampled_from([0.0, 0]))
        w, h = draw(st.sampled_from([41, 41.0])), draw(st.sampled_from([100, 100.0, 30.0]))
        out = [x, y, w, h]
        if draw(st.integers(0, 4)) == 0:  # one coordinate beyond float64's range
            out[draw(st.integers(0, 3))] = draw(st.sampled_from([HUGE, -HUGE]))
        return out

    annotations = [
        _ann(k + 1, box(), image_id=draw(st.sampled_from([1, 2])),
             category_id=draw(st.sampled_from([1, 1, 2])))
        for k in range(draw(st.integers(1, 3)))
    ]  # fmt: skip
    results = [
        _det(box(), score=draw(st.sampled_from([0.9, 0.5])),
             image_id=draw(st.sampled_from([1, 2])), category_id=draw(st.sampled_from([1, 1, 2])))
        for _ in range(draw(st.integers(1, 3)))
    ]  # fmt: skip
    return annotations, results


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(files=_files())
def test_random_files_raise_and_score_as_the_script(tmp_path, files):
    """Integers beyond float64's range (and 2**70, exact in the script) in either file's
    boxes, beside floats and integers, on images and categories with and without
    partners."""
    _agree(*_write(tmp_path, *files))
