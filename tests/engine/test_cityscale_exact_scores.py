"""Integer scores beyond 2**53 under ``miss-rate-cityscale`` (``loaders.exact_scores``).

The CityPersons script (``eval_MR_multisetup.py``) reads results with Python's ``json``,
so an integer score stays a Python ``int``; its ``evaluateImg`` ranks an image's list with
``np.argsort([-d['score'] for d in dt], kind='mergesort')`` (exact in int64, uint64 or
object arrays), keeps 1,000, then applies the height filter, and ``accumulate`` joins the
kept lists with ``np.concatenate`` (an empty list is float64) before its own argsort. The
engine ranks float64, and takes the script's exact order where it differs (replayed
when the file is read). Checked against the transliteration ``pedestrian_oracle.
cityscale_coco`` (written from the published code's logic), run on the parsed files with
their exact Python integers: every file it scores is scored equal to it, whole, cached,
stored as samples and under image weights.
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import load_predictions, load_truth
from evaluation.engine.__main__ import main
from evaluation.engine.level_samples import LevelSamples, setup_class
from evaluation.engine.pedestrian import evaluate_setups, evaluate_setups_with_samples

from . import pedestrian_oracle
from .cityscale_checks import SETUPS
from .test_pedestrian_cityscale import _compare, _files, script_input

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


def test_the_audit_case_is_scored_as_the_script_scores_it(tmp_path, capsys):
    """Exactly 2**60, 2**53 + 1, 2**53: miss rate 0.5 in every setup counted (the
    transliteration on the exact integers); float64 would tie 2**53 + 1 with 2**53 and
    put the false positive first. Whole, cached, stored as samples, through the CLI."""
    dataset, results, gt, dt = _audit_case(tmp_path)
    mean_s, _ = pedestrian_oracle.cityscale_coco(
        script_input(dataset), results, pedestrian_oracle.SETUP_IDS["reasonable"]
    )
    assert mean_s == pytest.approx(0.5, abs=1e-12)
    ours = _compare(tmp_path, dataset, results)
    assert ours["levels"]["reasonable"]["miss_rate"] == mean_s
    truth = load_truth(gt)
    assert load_predictions(dt, truth).score_conflicts["cityscale"]["record"] == "record 2"
    for _ in range(2):  # a cached load (written, then read back) carries the same order
        cached = load_predictions(dt, truth, cache_dir=str(tmp_path / "cache"))
        assert evaluate_setups(truth, cached, "miss-rate-cityscale") == ours
    output, samples = evaluate_setups_with_samples(truth, cached, "miss-rate-cityscale")
    samples.save(tmp_path / "levels.npz", output)
    _, read = LevelSamples.load(tmp_path / "levels.npz")
    assert "det_key" in samples.parts[("reasonable", "pedestrian")]
    for key, part in samples.parts.items():
        assert ("det_key" in part) == ("det_key" in read.parts[key])
        if "det_key" in part:
            assert np.array_equal(read.parts[key]["det_key"], part["det_key"])
        (miss_read, lamr_read), (miss, lamr) = (
            setup_class(read.parts[key], read.protocol),
            setup_class(part, samples.protocol),
        )
        assert lamr_read == lamr and np.array_equal(miss_read, miss), key
    code = main(
        ["score", "--truth", str(gt), "--predictions", str(dt)]
        + ["--protocol", "miss-rate-cityscale", "--format", "json"]
    )
    out = capsys.readouterr()
    assert code == 0, out.err
    assert json.loads(out.out)["headline"] == mean_s
    # the toolbox variants read MATLAB doubles (float64 is their order): scored
    for preset in ("miss-rate", "miss-rate-caltech"):
        assert evaluate_setups(truth, load_predictions(dt, truth), preset)["headline"] is not None


def test_weights_equal_the_duplicated_file(tmp_path):
    """Image 3 (the true positive, 2**53 + 1) weighted 2 and image 1 (2**53) weighted
    3: equal to the transliteration on the file with those images repeated (copies'
    ids adjacent, as ``test_level_samples`` duplicates), where the script's ties
    of equal integers keep image order."""
    dataset, results, gt, dt = _audit_case(tmp_path)
    results.append({**results[0], "score": B53 + 1})  # a tie of int64 with image 3's
    truth = load_truth(gt)
    dt.write_text(json.dumps(results))
    _, samples = evaluate_setups_with_samples(
        truth, load_predictions(dt, truth), "miss-rate-cityscale"
    )
    weights = np.ones(truth.n_images, np.int64)
    weights[[0, 2]] = 3, 2
    images, annotations, dets = [], [], []
    for image in dataset["images"]:
        for c in range(int(weights[image["id"] - 1])):
            new = image["id"] * 10 + c
            images.append({**image, "id": new})
            annotations += [
                {**a, "id": len(annotations) + n + 1, "image_id": new}
                for n, a in enumerate(
                    a for a in dataset["annotations"] if a["image_id"] == image["id"]
                )
            ]
            dets += [{**r, "image_id": new} for r in results if r["image_id"] == image["id"]]
    repeated = {**dataset, "images": images, "annotations": annotations}
    for setup in SETUPS:
        expected, mrs = pedestrian_oracle.cityscale_coco(
            script_input(repeated), dets, pedestrian_oracle.SETUP_IDS[setup]
        )
        miss, lamr = setup_class(samples.parts[(setup, "pedestrian")], samples.protocol, weights)
        if mrs is None:
            assert lamr is None, setup
            continue
        assert lamr == pytest.approx(expected, rel=1e-12), setup


def test_integers_float64_orders_alike_are_scored_as_the_script_scores_them(tmp_path):
    """2**60 and 2**53 + 1 on the two counted boxes' image, 2**53 elsewhere: no tie or
    rounding changes an order, so float64's order is the script's."""
    dataset, results, gt, dt = _audit_case(tmp_path)
    results[2]["score"] = B53 + 2  # float64 holds 2**53 + 2: strictly above 2**53
    ours = _compare(tmp_path, dataset, results)
    assert ours["levels"]["reasonable"]["miss_rate"] == pytest.approx(0.5, abs=1e-12)


def test_a_tie_the_height_filter_removes(tmp_path):
    """2**53 and 2**53 + 1 tie in float64 on one image, but the lower one (h = 10) is
    below every setup's expanded range (20 / 1.25 = 16 px): after the cap and the
    filter both orders keep the same detections in the same order: no order kept."""
    dataset, results, gt, dt = _audit_case(tmp_path)
    results[0] = {"image_id": 3, "category_id": 1, "bbox": [300, 10, 4, 10], "score": B53}
    results[1]["score"] = 0.5
    _compare(tmp_path, dataset, results)
    truth = load_truth(gt)
    assert not load_predictions(tmp_path / "dt.json", truth).score_conflicts["cityscale"]


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
def test_random_files_are_scored_as_the_script(tmp_path, files):
    """Equal to the transliteration on the exact integers, wherever it scores."""
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
    _compare(tmp_path, dataset, results)
