"""Paired bootstrap: the resampling and the percentile interval against
scipy.stats.bootstrap (paired=True, method='percentile'), with the same resamples."""

import numpy as np
import pytest
from scipy import stats

from evaluation.engine import match
from evaluation.engine.bootstrap import compare_ap, paired_bootstrap, resampled_weights
from evaluation.engine.curves import true_positive_totals

from .synthetic import make_detections, make_split


def _two_versions(files, seed=3):
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=40, n_classes=2, boxes_per_image=4)
    truth, baseline = files.load(split, make_detections(rng, split, hit_rate=0.8))
    _, candidate = files.load(split, make_detections(rng, split, hit_rate=0.6))
    return truth, match(truth, candidate, "coco"), match(truth, baseline, "coco")


def _recall_of(records, k):
    """Recall of class k at IoU 0.5 for image weights: weighted TP / weighted n_pos."""

    def statistic(weights):
        tp = true_positive_totals(records, max_detections=100, weights=weights)[0, k]
        return np.array([tp / records.n_positives(0, weights)[k]])

    return statistic


def _per_image(records, k):
    """Per-image TP and positive counts of class k, the data scipy resamples."""
    tp = np.zeros(records.n_images)
    tp_mask, _ = records.outcomes(0, 0)
    keep = tp_mask & (records.det_class == k) & (records.det_rank < 100)
    np.add.at(tp, records.det_image[keep], 1)
    n_pos = np.zeros(records.n_images)
    counted = (~records.gt_ignored[0]) & (records.gt_class == k)
    np.add.at(n_pos, records.gt_image[counted], 1)
    return tp, n_pos


def test_resamples_are_scipys():
    """Same seed, same draws: rng.integers(0, n, (B, n)) as scipy's _bootstrap_resample."""
    weights = resampled_weights(7, 5, np.random.default_rng(1))
    draws = np.random.default_rng(1).integers(0, 7, (5, 7))
    assert np.array_equal(weights, np.stack([np.bincount(d, minlength=7) for d in draws]))
    assert (weights.sum(axis=1) == 7).all()


def test_interval_equals_scipy_bootstrap_on_a_recall_difference(files):
    truth, candidate, baseline = _two_versions(files)
    k = 0
    ours = paired_bootstrap(
        _recall_of(candidate, k),
        _recall_of(baseline, k),
        truth.n_images,
        n_resamples=400,
        confidence=0.9,
        seed=11,
    )[0]
    tp_c, pos_c = _per_image(candidate, k)
    tp_b, pos_b = _per_image(baseline, k)

    def difference(tp_c, pos_c, tp_b, pos_b, axis=-1):
        return tp_c.sum(axis) / pos_c.sum(axis) - tp_b.sum(axis) / pos_b.sum(axis)

    reference = stats.bootstrap(
        (tp_c, pos_c, tp_b, pos_b),
        difference,
        paired=True,
        vectorized=True,
        n_resamples=400,
        confidence_level=0.9,
        method="percentile",
        rng=np.random.default_rng(11),
    )
    assert ours.estimate == pytest.approx(difference(tp_c, pos_c, tp_b, pos_b), abs=1e-12)
    assert ours.low == pytest.approx(reference.confidence_interval.low, abs=1e-12)
    assert ours.high == pytest.approx(reference.confidence_interval.high, abs=1e-12)
    assert ours.valid == 400


def test_ap_intervals_are_seeded_and_contain_the_estimate(files):
    _, candidate, baseline = _two_versions(files)
    first = compare_ap(candidate, baseline, "coco", n_resamples=60, seed=5)
    again = compare_ap(candidate, baseline, "coco", n_resamples=60, seed=5)
    assert first == again
    assert set(first) == {"mean", "class1", "class2"}
    for interval in first.values():
        assert interval.low <= interval.high
    assert first["mean"].estimate < 0  # the candidate finds fewer objects


def test_identical_detectors_have_a_zero_interval(files):
    _, candidate, _ = _two_versions(files)
    interval = compare_ap(candidate, candidate, "voc", n_resamples=30)["mean"]
    assert (interval.estimate, interval.low, interval.high) == (0.0, 0.0, 0.0)
    assert not interval.excludes_zero()


def test_worker_processes_give_the_same_intervals(files):
    _, candidate, baseline = _two_versions(files)
    one = compare_ap(candidate, baseline, "coco", n_resamples=24, seed=9)
    two = compare_ap(candidate, baseline, "coco", n_resamples=24, seed=9, workers=2)
    assert one == two
