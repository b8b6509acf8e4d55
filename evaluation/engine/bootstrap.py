"""Paired bootstrap confidence intervals for differences between two detectors.

Both detectors were scored on the same split, so their match records index the same
images. A replicate draws images with replacement — the same draw for both — and
re-accumulates each detector's records with those multiplicities as image weights:
no re-matching (see ``curves``; weights equal duplicated images exactly).
"""

import multiprocessing
from dataclasses import dataclass

import numpy as np

from .scoring import headline


@dataclass(frozen=True)
class Interval:
    """A statistic's point estimate and percentile bootstrap interval.

    ``valid`` counts the replicates where the statistic existed (a class whose
    resampled images hold none of its ground truth is absent in that replicate).
    """

    estimate: float
    low: float
    high: float
    confidence: float
    valid: int

    def excludes_zero(self):
        return bool(self.low > 0 or self.high < 0)

    def as_dict(self):
        return {
            "estimate": self.estimate,
            "low": self.low,
            "high": self.high,
            "confidence": self.confidence,
            "valid_replicates": self.valid,
        }


def resampled_weights(n_images, n_resamples, rng):
    r"""Image multiplicities of each replicate, shape (n_resamples, n_images).

    .. math:: w_b \sim \mathrm{Multinomial}(N, (1/N, \dots, 1/N))

    drawn as N indices with replacement per replicate, ``rng.integers(0, N, (B, N))``
    — the draws ``scipy.stats.bootstrap`` makes for paired samples, so the two agree
    replicate for replicate (Efron & Tibshirani, *An Introduction to the Bootstrap*,
    1993, ch. 6).
    """
    draws = rng.integers(0, n_images, (n_resamples, n_images))
    offsets = (np.arange(n_resamples) * n_images)[:, None]
    counts = np.bincount((draws + offsets).ravel(), minlength=n_resamples * n_images)
    return counts.reshape(n_resamples, n_images)


def percentile_interval(replicates, estimate, confidence):
    r"""Percentile interval per column, ignoring replicates where it is NaN.

    .. math:: [\hat\theta^*_{(\alpha/2)}, \hat\theta^*_{(1-\alpha/2)}], \quad
              \alpha = 1 - \text{confidence}

    with linear interpolation between order statistics (numpy's default quantile,
    as ``scipy.stats.bootstrap`` uses; Efron & Tibshirani 1993, ch. 13).
    """
    alpha = (1 - confidence) / 2
    out = []
    for column, point in zip(np.atleast_2d(replicates.T), np.atleast_1d(estimate)):
        present = column[~np.isnan(column)]
        if not present.size or np.isnan(point):
            out.append(
                Interval(float(point), float("nan"), float("nan"), confidence, int(present.size))
            )
            continue
        low, high = np.quantile(present, [alpha, 1 - alpha])
        out.append(Interval(float(point), float(low), float(high), confidence, int(present.size)))
    return out


def paired_bootstrap(
    statistic_candidate,
    statistic_baseline,
    n_images,
    *,
    n_resamples=1000,
    confidence=0.95,
    seed=0,
    workers=1,
):
    r"""Percentile intervals of Δ = S_candidate − S_baseline under paired resampling.

    .. math:: \Delta^*_b = S_C(w_b) - S_B(w_b)

    Parameters
    ----------
    statistic_candidate, statistic_baseline : callable(weights or None) -> 1-D array
        The statistics of each detector for image weights (None = the split as is);
        NaN marks a statistic that does not exist for those weights.
    n_images : int
    n_resamples, confidence, seed : keyword-only
        B, the interval's coverage, and the seed that makes results reproduce.
    workers : int, keyword-only
        Processes sharing the replicates (fork; the draws are made up front, so the
        result does not depend on this number).

    Returns
    -------
    list of Interval, one per statistic.
    """
    rng = np.random.default_rng(seed)
    estimate = np.asarray(statistic_candidate(None), float) - np.asarray(
        statistic_baseline(None), float
    )
    weights = resampled_weights(n_images, n_resamples, rng)
    global _JOB
    _JOB = (statistic_candidate, statistic_baseline, weights)
    chunks = np.array_split(np.arange(n_resamples), max(1, workers))
    if workers > 1 and n_resamples > 1:
        context = multiprocessing.get_context("fork")
        with context.Pool(workers) as pool:
            parts = pool.map(_replicates, chunks)
    else:
        parts = [_replicates(chunk) for chunk in chunks]
    _JOB = None
    replicates = np.concatenate(parts).reshape(n_resamples, estimate.size)
    return percentile_interval(replicates, estimate, confidence)


_JOB = None  # (statistic_candidate, statistic_baseline, weights), inherited by forked workers


def _replicates(indices):
    statistic_candidate, statistic_baseline, weights = _JOB
    out = np.empty(
        (len(indices), np.size(statistic_candidate(weights[indices[0]])) if len(indices) else 0)
    )
    for row, b in enumerate(indices):
        out[row] = np.asarray(statistic_candidate(weights[b]), float) - np.asarray(
            statistic_baseline(weights[b]), float
        )
    return out


def ap_statistic(records, protocol):
    """``weights -> [mean AP, AP of each class]`` for ``paired_bootstrap``."""

    def statistic(weights):
        mean, per_class = headline(records, protocol, weights=weights)
        return np.r_[mean, per_class]

    return statistic


def compare_ap(
    records_candidate,
    records_baseline,
    protocol,
    *,
    n_resamples=1000,
    confidence=0.95,
    seed=0,
    workers=1,
):
    """Intervals of the AP difference, mean first then each class, keyed by name."""
    if records_candidate.n_images != records_baseline.n_images:
        raise ValueError("both records must come from the same split")
    intervals = paired_bootstrap(
        ap_statistic(records_candidate, protocol),
        ap_statistic(records_baseline, protocol),
        records_candidate.n_images,
        n_resamples=n_resamples,
        confidence=confidence,
        seed=seed,
        workers=workers,
    )
    names = ["mean", *records_candidate.classes]
    return dict(zip(names, intervals))
