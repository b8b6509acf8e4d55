"""The version page: each split's scorecard."""

from ..class_thresholds import of_class, row_of
from . import miss_rate
from .provenance import stored_provenance
from .scores import (
    _class_rows,
    _scorecards,
    absent_classes,
    class_numbers,
    class_row,
    summary_items,
)


def version_scorecards(version, suite=None):
    """Per split: the primary scorecard with its class and slice rows, the headline of
    every other protocol, the miss-rate-versus-FPPI charts of the pedestrian setups
    (``miss_rate``), each difficulty-level protocol's table (``levels.level_table``),
    and (``deployed``) precision, recall and F1 at the deployed
    score threshold(s) of ``suite`` (default: the detector's current suite); how each
    was computed, as its stored result says (``provenance``: the primary scorecard's,
    ``other_provenance``: ``{protocol: ...}`` of the others, level protocols too;
    ``provenance.stored_provenance``). A fixed number of queries (plus one
    match-records file read per scored split)."""
    from evaluation import left_out, levels
    from evaluation.models import SliceScore

    from ..suites import current_suite

    detector = version.detector
    suite = suite or current_suite(detector)
    sets = sorted(
        version.prediction_sets.current().select_related("split", "predictions", "uploaded_by"),
        key=lambda ps: (ps.split.name, ps.split.revision),
    )
    cards = _scorecards(sets, detector.protocols, with_result=True)
    primary = [c for (_, p), c in cards.items() if p == detector.primary_protocol]
    rows = _class_rows(primary)
    slices = {}
    for s in SliceScore.objects.filter(scorecard__in=primary, kind="tag"):
        slices.setdefault(s.scorecard_id, {}).setdefault(s.name, {})[s.class_name or "mean"] = s.ap
    out = []
    for ps in sets:
        card = cards.get((ps.pk, detector.primary_protocol))
        out.append(
            {
                "prediction_set": ps,
                "split": ps.split,
                "card": card,
                "classes": [class_row(rows.get(card.pk, {}), c) for c in detector.classes]
                if card
                else [],
                # the classes without an AP, and why (the engine's protocol record)
                "absent": absent_classes(card, detector.classes) if card else [],
                # {tag: {the split's class or "mean": AP}} (the API's), and the page's
                # rows by the detector's classes, matched in any case (of_class)
                "tags": sorted(slices.get(card.pk, {}).items()) if card else [],
                "tag_rows": [
                    (tag, {c: of_class(values, c) for c in ["mean", *detector.classes]})
                    for tag, values in sorted(slices.get(card.pk, {}).items())
                ]
                if card
                else [],
                "summary": summary_items(card.summary) if card else [],
                "sizes": [
                    (name, card.result["slices"]["size"].get(name, {}).get("AP"))
                    for name in ("small", "medium", "large")
                ]
                if card
                else [],
                "others": [
                    (p, cards[(ps.pk, p)].summary.get("AP"))
                    for p in detector.protocols
                    if p != detector.primary_protocol and (ps.pk, p) in cards and not levels.get(p)
                ],
                "levels": [
                    levels.level_table(cards[(ps.pk, p)])
                    for p in detector.protocols
                    if levels.get(p) and (ps.pk, p) in cards
                ],
                "provenance": stored_provenance(card) if card else None,
                "other_provenance": {
                    p: stored_provenance(cards[(ps.pk, p)])
                    for p in detector.protocols
                    if p != detector.primary_protocol and (ps.pk, p) in cards
                },
                "deployed": deployed_numbers(card, suite, detector.classes) if card else None,
                "miss_rate": miss_rate.version_charts(version, cards, ps),
                # what the reference reading left out of the split and of this file
                "left_out": left_out.of_split(ps.split)
                + (left_out.of_result(card.result) if card else []),
            }
        )
    return out


def version_results(version):
    """The API's ``/versions/<id>/results/``: per split of the version's current
    prediction sets, the primary protocol's summary, per-class rows, slices, the
    headline AP of each other protocol (``other_protocols``) and each level protocol's
    table, and how every one of those numbers was computed, as its stored result
    says: the primary's ``protocol_record``, ``box_policy``, ``engine_version``,
    ``truth_fingerprint``, ... beside its numbers, each other protocol's (level ones
    too) in ``other_protocols_provenance`` keyed by protocol
    (``provenance.stored_provenance``; ``not_recorded`` says what an older result
    lacks)."""
    out = []
    for entry in version_scorecards(version):
        card = entry["card"]
        row = {
            "split": entry["split"].pk,
            "split_name": str(entry["split"]),
            "prediction_set": entry["prediction_set"].pk,
            "scored": card is not None,
            # what the reference reading left out of the split and of this file
            "left_out": entry["left_out"],
        }
        if card is not None:
            row.update(
                {
                    "evaluation": card.evaluation_id,
                    "protocol": card.protocol,
                    **entry["provenance"],
                    "summary": dict(entry["summary"]),
                    "classes": [class_numbers(c) for c in entry["classes"] if c is not None],
                    # classes without an AP, and why (the engine's words)
                    "absent_classes": dict(entry["absent"]),
                    "tags": dict(entry["tags"]),
                    "sizes": dict(entry["sizes"]),
                    "other_protocols": {p: ap for p, ap in entry["others"]},
                    # level protocols (kitti2d, miss-rate): per level x class
                    "levels": entry["levels"],
                    # how each other number (other_protocols, levels) was computed
                    "other_protocols_provenance": entry["other_provenance"],
                }
            )
        out.append(row)
    return {"version": version.pk, "label": version.label, "splits": out}


def shown_suite(version, verdict):
    """The suite a version's numbers are shown under: the one its current judgement (or
    decision) used, else the detector's current suite."""
    from ..suites import current_suite

    return getattr(verdict.judgement, "suite", None) or current_suite(version.detector)


def deployed_numbers(card, suite, classes):
    """Precision / recall / F1 of a scorecard at the suite's deployed score threshold(s)
    (``suites.deployed_operating_point``): ``rows`` per class in the detector's order
    (a class matches the scorecard's in any case: ``class_thresholds.row_of``), each
    with its threshold, and ``pooled``; None when the suite's primary protocol is
    not the card's or its match records cannot be read (the page still renders)."""
    from ..suites import deployed_operating_point

    if suite is None or card.protocol != suite.protocols[0]:
        return None
    try:
        numbers = deployed_operating_point(card, suite)
    except OSError:
        return None
    per_class = numbers["per_class"]
    found = [(c, row_of(per_class, c)) for c in classes]  # the scorecard keeps its spelling
    rows = [{"class": c, **per_class[key]} for c, key in found if key is not None]
    return {"suite_version": suite.number, "rows": rows, **numbers}


def replaced_sets(version):
    """The version's replaced uploads, newest first, each with its failed evaluations
    (``.failures``: [(protocol, error)]) — the history behind the current sets."""
    from evaluation.models import Evaluation

    sets = list(
        version.prediction_sets.filter(replaced_at__isnull=False)
        .select_related("split", "uploaded_by", "predictions", "replaced_by")
        .order_by("-replaced_at")
    )
    failed = Evaluation.objects.filter(
        state="failed", prediction_sets__in=[ps.pk for ps in sets]
    ).values_list("prediction_sets", "protocol", "error")
    errors = {}
    for set_id, protocol, error in failed.order_by("protocol"):
        errors.setdefault(set_id, []).append((protocol, error))
    for ps in sets:
        ps.failures = errors.get(ps.pk, [])
    return sets


DECIDING = ("fail", "missing")
DECIDING_SHOWN = 6  # more are folded, so the sign-off form stays in the first screen


def verdict_page(version, judgement_id=None):
    """The top of the version page: the current verdict, the outcomes of its judgement
    (or of an earlier one, by id) split into what decides it (failing and missing,
    the first six shown) and the rest (folded), the verdict's reasons that no shown
    outcome already states (a failed evaluation, a missing split), and the earlier
    judgements."""
    from .. import verdicts
    from ..models import Judgement
    from .decisions import outcomes_of

    verdict = verdicts.verdict_of(version)
    judgements = list(
        Judgement.objects.filter(version=version)
        .select_related("criteria", "suite", "baseline")
        .order_by("-id")
    )
    shown = verdict.judgement
    if judgement_id is not None:
        shown = next((j for j in judgements if j.pk == judgement_id), shown)
    outcomes = outcomes_of(version, shown) if shown is not None else []
    deciding = [o for o in outcomes if o.status in DECIDING]
    stated = {o.detail for o in deciding}
    return {
        "verdict": verdict,
        "reasons": [r for r in verdict.reasons if r not in stated],
        "deciding_total": len(deciding),
        "judgement": shown,
        "earlier_shown": shown is not None and shown != verdict.judgement,
        "deciding": deciding[:DECIDING_SHOWN],
        "deciding_more": deciding[DECIDING_SHOWN:],
        "others": [o for o in outcomes if o.status not in DECIDING],
        "earlier": [j for j in judgements if j != verdict.judgement],
    }
