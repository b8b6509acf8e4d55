"""Level protocols (``evaluation.levels``: kitti2d, the miss-rate setups) on the
compare page: per-level deltas from the two stored results."""


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
