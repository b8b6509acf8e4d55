"""Paired-bootstrap intervals of ΔAP between two scorecards: the one bootstrap the
significance rules (``rule_outcomes``) and requested comparisons (``comparisons``) share.
"""

import numpy as np
from django.conf import settings

from evaluation.services import load_records, load_truth_of

from . import rule_slices


def _records(card):
    return load_records(card)


def _intervals(candidate_card, baseline_card, tag, confidence, size=None):
    """Paired-bootstrap intervals of ΔAP (candidate − baseline): mean and every class,
    from one set of replicates (``{name: Interval}``), over the images carrying ``tag``
    or within size bucket ``size`` (re-accumulated from the records' size bucket)."""
    from evaluation.engine.bootstrap import paired_bootstrap
    from evaluation.engine.scoring import headline

    records_c, records_b = _records(candidate_card), _records(baseline_card)
    from evaluation.protocols import resolve

    resolved = resolve(candidate_card.protocol)
    rule = {"tag": tag, "size": size}
    mask, area = rule_slices.weights_and_area(candidate_card, records_c, rule, load_truth_of)
    if area and records_b.area_names != records_c.area_names:
        raise rule_slices.SliceUnavailable(
            f"the baseline's records have other size buckets ({', '.join(records_b.area_names)})"
        )

    def statistic(records):
        def of(weights):
            w = mask if weights is None else (weights if mask is None else weights * mask)
            mean, per_class = headline(records, resolved, weights=w, area=area)
            return np.r_[mean, per_class]

        return of

    intervals = paired_bootstrap(
        statistic(records_c),
        statistic(records_b),
        records_c.n_images,
        n_resamples=settings.BENCHBOOK_BOOTSTRAP_RESAMPLES,
        confidence=confidence,
        seed=settings.BENCHBOOK_BOOTSTRAP_SEED,
        workers=1,
    )
    return dict(zip(["mean", *records_c.classes], intervals))
