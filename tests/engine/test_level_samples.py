"""Level results recomputed from their stored per-image samples under image weights
(``engine/level_samples.py``): what the significance and tag rules on a level read.

Checks against sources outside the project:

* KITTI levels: the transliteration of the KITTI object devkit's ``eval_class`` /
  ``computeStatistics`` / ``getThresholds`` (``oracle.kitti_*``, written from the
  devkit's ``evaluate_object.cpp``) run on the split with each image written w times
  equals the samples' AP under weights w, every precision slot bit for bit.
* Pedestrian setups: the transliterations of the toolbox (Dollár et al., TPAMI 2012,
  ``bbGt`` ``evalRes``/``compRoc``, ``dbEval``) and the city-scale code (Zhang et al.,
  CVPR 2017) on the duplicated scene equal the weighted LAMR.
* Weight semantics (common practice for a bootstrap over images, Efron & Tibshirani
  1993, ch. 6): an integer weight w is the image w times; weight 0 is the image left
  out; weights of one are the unweighted result exactly (``==``, not approx).
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine.difficulty import evaluate_levels, evaluate_levels_with_samples
from evaluation.engine.level_samples import (
    LevelSamples,
    NoSamples,
    kitti_class,
    kitti_thresholds,
    level_statistic,
    setup_class,
)
from evaluation.engine.pedestrian import evaluate_setups, evaluate_setups_with_samples

from . import oracle, pedestrian_oracle
from .test_difficulty import _random_scene, _write
from .test_pedestrian import _files, _oracle_scene, _scenes

LEVELS = ("easy", "moderate", "hard")
KITTI_CLASSES = (("car", "Car"), ("pedestrian", "Pedestrian"), ("cyclist", "Cyclist"))


def _repeat(items, weights):
    return [item for item, w in zip(items, weights) for _ in range(int(w))]


# KITTI ---------------------------------------------------------------------------------


@pytest.mark.parametrize("seed", range(8))
def test_kitti_thresholds_equal_the_devkits_get_thresholds(seed):
    """``getThresholds`` (oracle.kitti_get_thresholds, a line-by-line transliteration)
    against the vectorised walk, on tied and untied scores, n_gt below and above 40."""
    rng = np.random.default_rng(seed)
    for _ in range(40):
        n = int(rng.integers(1, 120))
        scores = list(rng.choice([0.1, 0.25, 0.5, 0.75, 0.9], n) + rng.integers(0, 4, n) / 100)
        n_gt = int(rng.integers(n, n + 60))
        expected = oracle.kitti_get_thresholds(scores, n_gt)[:41]
        ours = kitti_thresholds(np.sort(scores)[::-1], n_gt)
        assert ours.tolist() == expected


@pytest.mark.parametrize("seed", range(6))
def test_kitti_weights_equal_duplicated_images(tmp_path, seed):
    """Integer weights (0-3) equal the devkit transliteration on the split written with
    each image that many times: every precision slot, AP_R40 and n_gt identical."""
    rng = np.random.default_rng(seed)
    scenes, detections = _random_scene(rng, 30)
    truth, predictions = _write(tmp_path / "gt", scenes, detections)
    output, samples = evaluate_levels_with_samples(truth, predictions, "kitti2d")
    weights = rng.integers(0, 4, truth.n_images)
    weights[-1] = 1  # the last image holds every class once (see _random_scene)
    twice_scenes, twice_dets = _repeat(scenes, weights), _repeat(detections, weights)
    twice_truth, twice_predictions = _write(tmp_path / "twice", twice_scenes, twice_dets)
    duplicated = evaluate_levels(twice_truth, twice_predictions, "kitti2d")
    for level in LEVELS:
        for cls, name in KITTI_CLASSES:
            if name not in truth.classes:
                continue
            ours = kitti_class(samples.parts[(level, name)], weights)
            assert ours == duplicated["levels"][level]["classes"][name]
            precision, n_gt = oracle.kitti_eval_class(
                cls, twice_scenes, twice_dets, LEVELS.index(level)
            )
            assert ours["n_gt"] == n_gt
            if n_gt:
                assert ours["precision"] == precision
                # the oracle sums the slots left to right, numpy pairwise: 1 ulp apart
                assert ours["AP_R40"] == pytest.approx(oracle.kitti_ap(precision)[0], abs=1e-15)


def test_kitti_weight_two_is_the_image_twice_and_zero_leaves_it_out(tmp_path):
    """The hand-built case where the devkit's re-matching at a threshold changes which
    detection is the true positive, so no fixed per-detection outcome reproduces it
    (computeStatistics: highest *score* when collecting thresholds, greatest *overlap*
    when counting). Image 0: cars b1 (0,0)-(100,50) and b2 (0,4)-(100,54);
    A (12,0)-(112,50) score 0.9: IoU(b1) = 88*50/(2*5000 - 4400) = 0.786,
    IoU(b2) = 88*46/(10000 - 4048) = 0.680 (not above 0.7);
    B (0,2)-(100,52) score 0.5: IoU 48/52 = 0.923 with both. Image 1: one car, nothing.

    Thresholds: b1 takes A (highest score), b2 takes B: TP scores [0.9, 0.5], n_gt 3.
    Counting at 0.9: A alone, b1 takes it: TP 1, FP 0. At 0.5: b1 takes B (greatest
    overlap), b2 has nothing above 0.7 left, A is a false positive: TP 1, FP 1 — the
    fixed outcomes "A, B true positives" would say TP 2, FP 0. getThresholds keeps 0.9
    (recall 1/3) and 0.5 (recall 2/3): precision slots [1, 0.5, 0, ...], AP_R40 =
    0.5 / 40 = 0.0125. Weights (2, 0), (1, 0), (0, 1), (3, 2) equal the transliteration
    on the duplicated split.
    """
    scenes = [
        [("Car", 0.0, 0.0, 100.0, 50.0, 0.0, 0), ("Car", 0.0, 4.0, 100.0, 54.0, 0.0, 0)],
        [("Car", 0.0, 0.0, 100.0, 50.0, 0.0, 0)],
    ]
    dets = [
        [("Car", 12.0, 0.0, 112.0, 50.0, 0.9), ("Car", 0.0, 2.0, 100.0, 52.0, 0.5)],
        [],
    ]
    truth, predictions = _write(tmp_path / "gt", scenes, dets)
    output, samples = evaluate_levels_with_samples(truth, predictions, "kitti2d")
    part = samples.parts[("moderate", "Car")]
    assert part["n_gt"].tolist() == [2, 1]
    assert part["tp_score"].tolist() == [0.9, 0.5]
    assert part["step_score"].tolist() == [0.9, 0.5]
    assert part["step_tp"].tolist() == [1, 0] and part["step_fp"].tolist() == [0, 1]
    moderate = output["levels"]["moderate"]["classes"]["Car"]
    assert moderate["precision"][:3] == [1.0, 0.5, 0.0]
    assert moderate["AP_R40"] == 0.5 / 40
    for weights in ([2, 0], [1, 0], [0, 1], [3, 2]):
        w_scenes, w_dets = _repeat(scenes, weights), _repeat(dets, weights)
        precision, n_gt = oracle.kitti_eval_class("car", w_scenes, w_dets, 1)
        ours = kitti_class(part, np.array(weights))
        assert ours["n_gt"] == n_gt
        assert ours["precision"] == precision
    assert kitti_class(part, np.array([0, 1]))["AP_R40"] == 0.0  # a box, no detection
    assert kitti_class(part, np.array([0, 0]))["AP_R40"] is None  # no box: absent


def test_kitti_weights_of_one_are_the_result_bit_for_bit(tmp_path):
    rng = np.random.default_rng(100)
    scenes, detections = _random_scene(rng, 150)
    truth, predictions = _write(tmp_path / "gt", scenes, detections)
    output, samples = evaluate_levels_with_samples(truth, predictions, "kitti2d")
    ones = np.ones(truth.n_images, np.int64)
    for level in LEVELS:
        stat = level_statistic(samples, level, ones)
        entry = output["levels"][level]
        assert stat[0] == entry["AP_R40"]
        for k, name in enumerate(samples.classes):
            value = entry["classes"][name]["AP_R40"]
            assert (np.isnan(stat[k + 1]) and value is None) or stat[k + 1] == value
            assert kitti_class(samples.parts[(level, name)], ones) == entry["classes"][name]


# Pedestrian setups -------------------------------------------------------------------


@settings(
    max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(scene=_scenes(), data=st.data())
def test_setup_weights_equal_duplicated_images(tmp_path, scene, data):
    """Tied scores across images decide which curve points exist (``compRoc`` keeps a
    point after every detection), so the copies' order matters: copy c's detections
    right after copy c-1's. Both transliterations on the duplicated scene agree."""
    weights = np.array(
        data.draw(st.lists(st.integers(0, 3), min_size=len(scene), max_size=len(scene)))
    )
    if weights.sum() == 0:
        weights[0] = 1
    truth, predictions = _files(tmp_path, scene)
    twice = _repeat(scene, weights)
    (tmp_path / "twice").mkdir(exist_ok=True)
    twice_truth, twice_predictions = _files(tmp_path / "twice", twice)
    for protocol, reference in (
        ("miss-rate", pedestrian_oracle.toolbox),
        ("miss-rate-cityscale", pedestrian_oracle.cityscale),
        ("miss-rate-caltech", lambda s, setup: pedestrian_oracle.toolbox(s, setup, caltech=True)),
    ):
        _, samples = evaluate_setups_with_samples(truth, predictions, protocol)
        duplicated = evaluate_setups(twice_truth, twice_predictions, protocol)
        for setup in samples.levels:
            part = samples.parts[(setup, "pedestrian")]
            miss, lamr = setup_class(part, samples.protocol, weights)
            row = duplicated["levels"][setup]["classes"]["pedestrian"]
            assert lamr == row["miss_rate"], (protocol, setup)
            if lamr is not None:
                assert miss.tolist() == row["reference_miss_rate"]
            crowd_read = protocol != "miss-rate-cityscale"
            expected, _ = reference(_oracle_scene(twice, crowd_read), setup)
            assert (lamr is None) == (expected is None)
            if expected is not None:
                assert lamr == pytest.approx(expected, rel=1e-12, abs=1e-300)


def test_setup_weight_two_keeps_tied_copies_in_image_order(tmp_path):
    """Two images, each one pedestrian (h = 100, visible) and one detection, both
    score 0.5: image 1's is a true positive (on its box), image 2's a false positive
    (elsewhere). Unweighted, compRoc's points after every detection in image order:
    (FP 0, TP 1), (FP 1, TP 1); FPPI = FP / 2 images: 0 and 0.5, recall 1/2 → at the
    references 0.01..0.316 the last point at or below is FPPI 0 (recall 0.5), at
    0.562 and 1 also recall 0.5: LAMR = 0.5. Image 1 weighted 2: three images, the
    copies' TPs first: (0, 1/3), (0, 2/3), (1, 2/3) of n_gt 3; FPPI 1/3 at the last
    point: references <= 0.316 read 2/3, 0.562 and 1.0 read 2/3 too: LAMR = 1/3."""
    box = {"cls": "pedestrian", "bbox": [10.0, 10.0, 40.0, 100.0], "vis": None, "crowd": False}
    scene = [
        {"gt": [box], "dt": [([10.0, 10.0, 40.0, 100.0], 0.5)]},
        {"gt": [box], "dt": [([300.0, 10.0, 40.0, 100.0], 0.5)]},
    ]
    truth, predictions = _files(tmp_path, scene)
    _, samples = evaluate_setups_with_samples(truth, predictions, "miss-rate")
    part = samples.parts[("reasonable", "pedestrian")]
    assert setup_class(part, samples.protocol)[1] == pytest.approx(0.5, abs=1e-15)
    assert setup_class(part, samples.protocol, np.array([2, 1]))[1] == pytest.approx(
        1 / 3, abs=1e-15
    )
    assert setup_class(part, samples.protocol, np.array([0, 1]))[1] == pytest.approx(1.0)
    assert setup_class(part, samples.protocol, np.array([0, 0])) == (None, None)


# Stored file -------------------------------------------------------------------------


def test_samples_file_round_trips_and_older_files_say_rescore(tmp_path):
    rng = np.random.default_rng(3)
    scenes, detections = _random_scene(rng, 12)
    truth, predictions = _write(tmp_path / "gt", scenes, detections)
    output, samples = evaluate_levels_with_samples(truth, predictions, "kitti2d")
    path = tmp_path / "levels.npz"
    samples.save(path, output)
    read_output, read = LevelSamples.load(path)
    assert read_output == json.loads(json.dumps(output))
    assert (read.kind, read.n_images, read.levels, read.classes) == (
        "kitti",
        truth.n_images,
        list(LEVELS),
        samples.classes,
    )
    for level in LEVELS:
        np.testing.assert_array_equal(level_statistic(read, level), level_statistic(samples, level))
    older = tmp_path / "older.npz"
    older.write_text(json.dumps(output))  # what a level scorecard held before
    with pytest.raises(NoSamples, match="re-score"):
        LevelSamples.load(older)
