"""Integer scores beyond 2**53 under ``miss-rate-cityscale`` (``loaders.exact_scores``).

The CityPersons script (``eval_MR_multisetup.py``) reads results with Python's ``json``,
so an integer score stays a Python ``int``; its ``evaluateImg`` ranks an image's list with
``np.argsort([-d['score'] for d in dt], kind='mergesort')`` (exact in int64, uint64 or
object arrays), keeps 1,000, then applies the height filter, and ``accumulate`` joins the
kept lists with ``np.concatenate`` (an empty list is float64) before its own argsort. The
engine ranks float64. Checked against the transliteration ``pedestrian_oracle.
cityscale_coco`` (written from the published code's logic), run on the parsed files with
their exact Python integers: every file is either scored equal to it or refused naming
file, record and field ``score`` — never scored differently.
"""

import json

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.__main__ import main
from evaluation.engine.pedestrian import evaluate_setups

from . import pedestrian_oracle
from .test_pedestrian_cityscale import SETUPS, _compare, _files, script_input

B53 = 2**53
#: Integers float64 ties or rounds (2**53 + 1, 2**60 + 1...), beyond int64 (uint64 and
#: object arrays), their float twins, small integers, floats and booleans.
SCORES = [
    B53,
    B53 + 1,
    B53 + 2,
    B53 + 3,
    2**60,
    2**60 + 1,
    -(B53 + 1),
    2**63 + 1,
    2**64 + 3,
    10**20,
    9007199254740993.0,
    0.5,
    0.9,
    7,
    True,
]


def _audit_case(root):
    """Three detections of category 1, one per image, on 100 images; two counted boxes
    on image 3: 2**53 (FP, image 1), 2**60 (FP, image 2), 2**53 + 1 (TP, image 3).
    Exactly: 2**60, 2**53 + 1, 2**53 -> recall 0.5 at FPPI 0.01 (miss rate 0.5 on every
    reference point); in float64 2**53 + 1 ties 2**53 and the FP comes first."""
    images = [{"id": i, "width": 400, "height": 300} for i in range(1, 101)]
    box = [10, 10, 41, 100]
    annotations = [
        {"id": 1, "image_id": 3, "category_id": 1, "bbox": box, "area": 4100, "iscrowd": 0},
        {"id": 2, "image_id": 3, "category_id": 1, "bbox": [200, 10, 41, 100], "area": 4100},
    ]
    dataset = {
        "images": images,
        "categories": [{"id": 1, "name": "pedestrian"}],
        "annotations": annotations,
    }
    results = [
        {"image_id": i, "category_id": 1, "bbox": box, "score": s}
        for i, s in ((1, B53), (2, 2**60), (3, B53 + 1))
    ]
    gt, dt = root / "gt.json", root / "dt.json"
    gt.write_text(json.dumps(dataset))
    dt.write_text(json.dumps(results))
    return dataset, results, gt, dt


def test_the_audit_case_is_refused_naming_the_record(tmp_path, capsys):
    dataset, results, gt, dt = _audit_case(tmp_path)
    # the reference (transliteration on the exact integers): 0.5 in every setup counted
    mean_s, _ = pedestrian_oracle.cityscale_coco(
        script_input(dataset), results, pedestrian_oracle.SETUP_IDS["reasonable"]
    )
    assert mean_s == pytest.approx(0.5, abs=1e-12)
    truth = load_truth(gt)
    with pytest.raises(InputError) as err:
        evaluate_setups(truth, load_predictions(dt, truth), "miss-rate-cityscale")
    assert err.value.record == "record 2" and err.value.field == "score"
    assert "eval_MR_multisetup.py" in str(err.value) and str(dt) in str(err.value)
    # a cached load (twice: written, then read back) carries the same refusal
    for _ in range(2):
        cached = load_predictions(dt, truth, cache_dir=str(tmp_path / "cache"))
        assert cached.cityscale_conflict()["record"] == "record 2"
    # the CLI: exit 2, one located line, no traceback
    code = main(
        ["score", "--truth", str(gt), "--predictions", str(dt)]
        + ["--protocol", "miss-rate-cityscale", "--format", "json"]
    )
    out = capsys.readouterr()
    assert code == 2 and "record 2" in out.err and "Traceback" not in out.err
    # the toolbox variants read MATLAB doubles (float64 is their order): scored
    for preset in ("miss-rate", "miss-rate-caltech"):
        assert evaluate_setups(truth, load_predictions(dt, truth), preset)["headline"] is not None


def test_integers_float64_orders_alike_are_scored_as_the_script_scores_them(tmp_path):
    """2**60 and 2**53 + 1 on the two counted boxes' image, 2**53 elsewhere: no tie or
    rounding changes an order, so nothing is refused and the numbers are the script's."""
    dataset, results, gt, dt = _audit_case(tmp_path)
    results[2]["score"] = B53 + 2  # float64 holds 2**53 + 2: strictly above 2**53
    ours = _compare(tmp_path, dataset, results)
    assert ours["levels"]["reasonable"]["miss_rate"] == pytest.approx(0.5, abs=1e-12)


def test_a_tie_the_height_filter_removes_is_not_refused(tmp_path):
    """2**53 and 2**53 + 1 tie in float64 on one image, but the lower one (h = 10) is
    below every setup's expanded range (20 / 1.25 = 16 px): after the cap and the
    filter both orders keep the same detections in the same order."""
    dataset, results, gt, dt = _audit_case(tmp_path)
    results[0] = {"image_id": 3, "category_id": 1, "bbox": [300, 10, 4, 10], "score": B53}
    results[1]["score"] = 0.5
    _compare(tmp_path, dataset, results)


@st.composite
def _big_files(draw):
    dataset, results = draw(_files())
    for r in results:
        r["score"] = draw(st.sampled_from(SCORES))
    return dataset, results


@settings(
    max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(files=_big_files())
def test_random_files_are_scored_as_the_script_or_refused(tmp_path, files):
    """Equal to the transliteration on the exact integers, or refused (located)."""
    dataset, results = files
    if not results:  # loadRes indexes anns[0]: the script cannot read an empty list
        return
    script = script_input(dataset)
    try:
        for setup in SETUPS:
            pedestrian_oracle.cityscale_coco(script, results, pedestrian_oracle.SETUP_IDS[setup])
    except TypeError:
        # a class of booleans only: the script's accumulate cannot negate a boolean
        # array and raises; the engine scores 1/0 (DEVELOPERS.md, as for pycocotools)
        return
    try:
        _compare(tmp_path, dataset, results)
    except InputError as err:
        assert err.field == "score" and err.record.startswith("record "), err
        assert "eval_MR_multisetup.py" in str(err)
