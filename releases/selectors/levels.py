"""Level protocols (``evaluation.levels``, e.g. kitti2d) on the history chart: each
level of each level protocol in the detector's suite is one more metric, read from
the stored ``SliceScore`` rows of kind ``level`` (one query)."""

from ..models import PredictionSet


def level_metrics(detector, versions, splits, classes, version_of):
    """``({metric: protocol}, {split id: {metric: {class: [value per version]}}})``;
    a metric is named ``"<level> <value key>"`` under its protocol (``moderate
    AP_R40``); the headline level first."""
    from evaluation import levels
    from evaluation.models import SliceScore

    protocols = [p for p in detector.protocols if levels.get(p) and levels.get(p).metric == "AP"]
    if not protocols:
        return {}, {}
    metrics, keys = {}, {}
    for name in protocols:
        protocol = levels.get(name)
        ordered = sorted(protocol.levels, key=lambda lv: lv != protocol.headline_level)
        for level in ordered:
            metric = f"{level} {protocol.value_key}"
            if len(protocols) > 1:
                metric = f"{metric} ({name})"
            metrics[metric] = name
            keys[(name, level)] = metric
    position = {v.pk: i for i, v in enumerate(versions)}
    values = {
        split.pk: {m: {c: [None] * len(versions) for c in classes} for m in metrics}
        for split in splits
    }
    rows = SliceScore.objects.filter(
        kind="level",
        scorecard__evaluation__state="done",
        scorecard__evaluation__protocol__in=protocols,
        scorecard__evaluation__prediction_sets__in=PredictionSet.objects.current().filter(
            version__detector=detector
        ),  # the sets' own evaluations, as history_chart
    ).values_list(
        "scorecard__evaluation__predictions_id",
        "scorecard__evaluation__split_id",
        "scorecard__evaluation__protocol",
        "name",
        "class_name",
        "ap",
    )
    for file_id, split_id, protocol, level, class_name, ap in rows:
        version_id = version_of.get((file_id, split_id))
        metric = keys.get((protocol, level))
        cells = values.get(split_id, {}).get(metric, {}).get(class_name or "mean")
        if version_id is None or cells is None:
            continue
        cells[position[version_id]] = None if ap is None else round(ap, 4)
    return metrics, values


def level_deltas(reference, candidate, sets):
    """Compare page: per split id, per level protocol of the suite, the deltas
    (candidate − reference) of each level's mean and classes, from the two stored level
    results: ``{split id: [{"protocol", "levels", "lower_is_better", "rows": [{"class",
    "cells": [delta per level]}]}]}``. No interval: a level result keeps no match
    records to resample, so no level delta is marked significant."""
    from evaluation import levels

    from .compare import _delta
    from .scores import _scorecards

    names = [p for p in reference.detector.protocols if levels.get(p)]
    if not names:
        return {}
    cards = _scorecards(sets, names, with_result=True)
    sides = {}
    for ps in sets:
        for name in names:
            card = cards.get((ps.pk, name))
            if card is not None:
                sides.setdefault((ps.split_id, name), {})[ps.version_id] = card
    out = {}
    for (split_id, _name), pair in sorted(sides.items(), key=lambda kv: names.index(kv[0][1])):
        if reference.pk not in pair or candidate.pk not in pair:
            continue
        a = levels.level_table(pair[reference.pk])
        b = levels.level_table(pair[candidate.pk])
        b_rows = {row["class"]: row["values"] for row in b["rows"]}
        rows = [
            {
                "class": row["class"],
                "cells": [
                    _delta(row["class"], va, vb)
                    for va, vb in zip(
                        row["values"], b_rows.get(row["class"], [None] * len(a["levels"]))
                    )
                ],
            }
            for row in a["rows"]
        ]
        out.setdefault(split_id, []).append({**a, "rows": rows})
    return out
