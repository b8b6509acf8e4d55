"""The compare page: deltas between two versions and what marks them."""

from ..class_thresholds import of_class, row_of
from ..models import PredictionSet
from . import miss_rate
from .levels import level_deltas
from .scores import _class_rows, _scorecards, absent_classes, class_row


def significance(delta, interval):
    """How the compare page marks a delta: ``regression`` or ``gain`` only when its
    interval excludes zero (the percentile-interval test of a paired bootstrap, common
    practice), ``not significant`` when it holds zero, None when there is no interval."""
    if delta is None or not interval or interval[0] is None or interval[1] is None:
        return None
    if interval[1] < 0:
        return "regression"
    if interval[0] > 0:
        return "gain"
    return "not significant"


def _delta(name, reference, candidate, interval=None):
    delta = None if reference is None or candidate is None else candidate - reference
    return {
        "class": name,
        "reference": reference,
        "candidate": candidate,
        "delta": delta,
        "interval": interval,
        "significance": significance(delta, interval),
    }


def protocol_differences(a, b):
    """How two scorecards' numbers were computed differently, in words: one row per
    setting of the engine's protocol record that differs (``engine.differences``:
    protocol version, box policy, tie order, engine version, ...). Scorecards stored
    before the record existed are compared on protocol and engine versions only."""
    from evaluation import engine

    ra, rb = a.result or {}, b.result or {}
    if "protocol_record" in ra and "protocol_record" in rb:
        found = engine.differences(ra, rb)
    else:
        found = [
            (key, va, vb, effect)
            for key, va, vb, effect in (
                (
                    "protocol version",
                    a.protocol_version,
                    b.protocol_version,
                    "a revised version of the protocol: its rules changed",
                ),
                (
                    "engine version",
                    a.engine_version,
                    b.engine_version,
                    "computed by different engine versions; any number may differ",
                ),
            )
            if va != vb
        ]
        if bool(ra.get("protocol_record")) != bool(rb.get("protocol_record")):
            found.append(
                (
                    "protocol record",
                    "stored" if ra.get("protocol_record") else "none (older result)",
                    "stored" if rb.get("protocol_record") else "none (older result)",
                    "one result predates the protocol record; score it again to compare "
                    "every setting",
                )
            )
    return [
        {"setting": key.replace("_", " "), "reference": va, "candidate": vb, "effect": effect}
        for key, va, vb, effect in found
    ]


def _stored_intervals(reference, candidate, pairs, protocol):
    """{split id: (state, {tag or "": {class: [low, high, confidence]}}, error,
    {size: {class: [low, high, confidence]}})} of the intervals computed on request for
    exactly these inputs (``releases.comparisons``)."""
    from django.conf import settings as django_settings
    from django.db.models import Q

    from ..comparisons import CONFIDENCE
    from ..models import ComparisonInterval

    if not pairs:
        return {}
    match = Q()
    for ref_set, cand_set in pairs.values():
        match |= Q(
            split_id=cand_set.split_id,
            reference_predictions_id=ref_set.predictions_id,
            candidate_predictions_id=cand_set.predictions_id,
        )
    rows = ComparisonInterval.objects.filter(
        match,
        team_id=candidate.detector.team_id,
        protocol=protocol,
        confidence=CONFIDENCE,
        resamples=django_settings.BENCHBOOK_BOOTSTRAP_RESAMPLES,
        seed=django_settings.BENCHBOOK_BOOTSTRAP_SEED,
    )
    return {
        row.split_id: (
            row.state,
            {
                tag: {name: [*pair, row.confidence] for name, pair in by_class.items()}
                for tag, by_class in row.intervals.items()
            },
            row.error,
            {
                size: {name: [*pair, row.confidence] for name, pair in by_class.items()}
                for size, by_class in row.size_intervals.items()
            },
        )
        for row in rows
    }


def compare_versions(reference, candidate):
    """Per shared split: per-class AP deltas (candidate - reference), worst first,
    tag-slice deltas, level protocols' per-level deltas (``levels``), both versions'
    precision-recall curves (and miss-rate-versus-FPPI curves of the pedestrian setups,
    ``miss_rate``), and the intervals that decide whether a delta is marked: from the
    candidate's judgement against this reference, else computed on request
    (``interval_state``: None, queued, done or failed; ``missing_intervals`` when a
    delta has none and none is being computed)."""
    from evaluation.models import SliceScore

    from ..models import Outcome

    detector = reference.detector
    protocol = detector.primary_protocol
    sets = list(
        PredictionSet.objects.current()
        .filter(version__in=[reference, candidate])
        .select_related("split")
    )
    cards = _scorecards(sets, [protocol], with_result=True)
    # Intervals exist where the candidate was judged against this reference (its baseline).
    judged = {
        (o.split_id, o.class_name): [o.low, o.high, o.rule.get("confidence")]
        for o in Outcome.objects.filter(
            version=candidate,
            baseline=reference,
            low__isnull=False,
            rule__tag__isnull=True,
            rule__size__isnull=True,
            rule__level__isnull=True,  # a level's interval is not the primary's ΔAP
        )
    }
    judged_sizes = {
        (o.split_id, o.rule["size"], o.class_name): [o.low, o.high, o.rule.get("confidence")]
        for o in Outcome.objects.filter(
            version=candidate, baseline=reference, low__isnull=False, rule__size__isnull=False
        )
    }
    by_version, pairs = {}, {}
    for ps in sets:
        card = cards.get((ps.pk, protocol))
        if card is not None:
            by_version.setdefault(ps.split, {})[ps.version_id] = card
            pairs.setdefault(ps.split, [None, None])[ps.version_id == candidate.pk] = ps
    pairs = {s: p for s, p in pairs.items() if None not in p}
    stored = _stored_intervals(reference, candidate, pairs, protocol)
    used = [c for pair in by_version.values() for c in pair.values()]
    rows = _class_rows(used)
    miss_rate_charts = miss_rate.compare_charts(reference, candidate, sets)
    tag_ap, size_ap, size_names = {}, {}, {}
    for s in SliceScore.objects.filter(scorecard__in=used, kind__in=["tag", "size"]).order_by("pk"):
        # {(card, slice): {the split's class name or "mean": AP}}, read by a detector's
        # class in any case (class_thresholds.of_class)
        if s.kind == "tag":
            tag_ap.setdefault((s.scorecard_id, s.name), {})[s.class_name or "mean"] = s.ap
        else:
            size_ap.setdefault((s.scorecard_id, s.name), {})[s.class_name or "mean"] = s.ap
            size_names.setdefault(s.scorecard_id, {})[s.name] = None
    by_level = level_deltas(reference, candidate, sets)  # kitti2d levels (selectors/levels.py)
    out = []
    for split in sorted(by_version, key=lambda s: (s.name, s.revision)):
        pair = by_version[split]
        if reference.pk not in pair or candidate.pk not in pair:
            continue
        a, b = pair[reference.pk], pair[candidate.pk]
        state, computed, error, computed_sizes = stored.get(split.pk, (None, {}, "", {}))
        computed, computed_sizes = (computed, computed_sizes) if state == "done" else ({}, {})
        whole = computed.get("", {})
        deltas = []
        for name in ["mean", *detector.classes]:
            if name == "mean":
                va, vb = a.summary.get("AP"), b.summary.get("AP")
            else:
                ra, rb = class_row(rows.get(a.pk, {}), name), class_row(rows.get(b.pk, {}), name)
                va, vb = (ra.ap if ra else None), (rb.ap if rb else None)
            interval = of_class(whole, name) or judged.get((split.pk, name))
            deltas.append(_delta(name, va, vb, interval))
        deltas.sort(key=lambda d: (d["class"] != "mean", d["delta"] is None, d["delta"] or 0))
        tags = sorted({k[1] for k in tag_ap if k[0] in (a.pk, b.pk)})
        tag_rows = [
            {
                "tag": tag,
                "cells": [
                    _delta(
                        name,
                        of_class(tag_ap.get((a.pk, tag), {}), name),
                        of_class(tag_ap.get((b.pk, tag), {}), name),
                        of_class(computed.get(tag, {}), name),
                    )
                    for name in ["mean", *detector.classes]
                ],
            }
            for tag in tags
        ]
        sizes = [n for n in size_names.get(b.pk, {}) if n in size_names.get(a.pk, {})]
        size_rows = [
            {
                "size": size,
                "cells": [
                    _delta(
                        name,
                        of_class(size_ap.get((a.pk, size), {}), name),
                        of_class(size_ap.get((b.pk, size), {}), name),
                        of_class(computed_sizes.get(size, {}), name)
                        or judged_sizes.get((split.pk, size, name)),
                    )
                    for name in ["mean", *detector.classes]
                ],
            }
            for size in sizes
        ]
        found = {
            name: (row_of(a.result["per_class"], name), row_of(b.result["per_class"], name))
            for name in detector.classes
        }
        curves = {
            name: {
                "reference": a.result["per_class"][ka]["curve"],
                "candidate": b.result["per_class"][kb]["curve"],
            }
            for name, (ka, kb) in found.items()
            if ka is not None and kb is not None
        }
        out.append(
            {
                "split": split,
                "deltas": deltas,
                "tags": tag_rows,
                "sizes": size_rows,
                "curves": curves,
                "miss_rate": miss_rate_charts.get(split.pk, []),
                "interval_state": state,
                "missing_intervals": state != "done"
                and any(d["delta"] is not None and not d["interval"] for d in deltas),
                "interval_error": error if state == "failed" else "",
                # (version, class, why) for each class without an AP on either side
                "absent": [
                    (version.label, name, why)
                    for version, card in ((reference, a), (candidate, b))
                    for name, why in absent_classes(card, detector.classes)
                ],
                "protocol_differences": protocol_differences(a, b),
                "levels": by_level.get(split.pk, []),
            }
        )
    return out
