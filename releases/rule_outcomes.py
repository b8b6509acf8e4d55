"""Judge a candidate against its detector's criteria (``criteria``): one outcome per
rule, split and class.

A regression is a *fail* only when the paired-bootstrap interval of the difference
excludes zero on the bad side and the drop exceeds the tolerance; a drop whose interval
holds zero is *not significant*.
"""

from evaluation.engine.provenance import UNDEFINED_AP
from evaluation.models import BenchmarkSplit, ClassScore

from . import level_rules, rule_slices, selectors
from .class_thresholds import row_of, shared_note
from .criteria import METRICS
from .delta_intervals import _intervals
from .models import Outcome


def _scorecards(sets, protocol):
    """{split: Scorecard} of these prediction sets' own finished evaluations under
    ``protocol`` (``selectors._scorecards``)."""
    sets = list(sets)
    cards = selectors._scorecards(sets, [protocol])
    return {ps.split: cards[(ps.pk, protocol)] for ps in sets if (ps.pk, protocol) in cards}


def _value(card, metric, name):
    """The card's number of ``metric`` for ``name`` (``mean`` or a class, matched to the
    split's own names in any case: ``class_thresholds.row_of``); None: not measured."""
    if card is None:
        return None
    if name == "mean":
        row = ClassScore.objects.filter(scorecard=card, class_name="").first()
    else:
        rows = {r.class_name: r for r in ClassScore.objects.filter(scorecard=card)}
        row = rows.get(row_of(rows, name))
    return getattr(row, METRICS[metric]) if row else None


def _shared(card, name, cache):
    """``class_thresholds.shared_note`` of ``name`` on the card's split (None: the
    class names at most one category); the split's classes read once per card."""
    if card is None or name == "mean":
        return None
    key = ("classes", card.pk)
    if key not in cache:
        cache[key] = list(
            ClassScore.objects.filter(scorecard=card)
            .exclude(class_name="")
            .values_list("class_name", flat=True)
        )
    return shared_note(cache[key], name)


def outcomes_for(version, inputs):
    """The outcomes (unsaved) of ``version`` under ``inputs.criteria`` (verdicts.Inputs).

    A rule over split ``*`` covers the suite's required splits (the uploaded ones when
    the suite requires none); a named split is judged whether uploaded or not. A split
    without a scored evaluation under the primary protocol gives an explicit *missing*
    outcome, never a skipped rule.
    """
    from .verdicts import current_sets

    detector = version.detector
    protocol = inputs.suite.protocols[0] if inputs.suite else detector.primary_protocol
    cards = _scorecards(inputs.sets, protocol)
    baseline = inputs.baseline
    baseline_cards = _scorecards(current_sets(baseline), protocol) if baseline else {}
    by_name = {f"{s.name}:{s.revision}": s for s in BenchmarkSplit.objects.all()}
    everywhere = inputs.required or sorted(cards, key=lambda s: (s.name, s.revision))
    outcomes = []
    level_cards = {}  # {protocol: ({split: card}, {split: baseline card})}, and "read once":
    # the level rules' samples, tag masks and bootstraps (level_rules.judge)
    bootstraps = {}  # one set of replicates per split, tag and confidence serves every class
    for index, rule in enumerate(inputs.criteria.rules):
        splits = everywhere if rule["split"] == "*" else [by_name[rule["split"]]]
        names = detector.classes if rule["class"] == "*" else [rule["class"]]
        if "level" in rule:
            outcomes += _judge_level(version, inputs, index, rule, splits, level_cards)
            continue
        for split in splits:
            for name in names:
                outcomes.append(
                    _judge_one(
                        version,
                        inputs.criteria,
                        index,
                        rule,
                        split,
                        name,
                        cards.get(split),
                        baseline,
                        baseline_cards.get(split),
                        bootstraps,
                    )
                )
    failed = {ps.split_id for ps in inputs.sets} & {
        e.split_id for e in inputs.evaluations if e.state == "failed"
    }
    for outcome in outcomes:
        if outcome.status == Outcome.Status.MISSING and outcome.split_id in failed:
            outcome.detail = f"no scored predictions on {outcome.split}: the evaluation failed"
    return outcomes


def _judge_level(version, inputs, index, rule, splits, level_cards):
    """Outcomes of a rule on a level (``level_rules``), from the scorecards of the
    suite's level protocol holding it (read once per protocol)."""
    from .verdicts import current_sets

    detector, baseline = version.detector, inputs.baseline
    names = list(inputs.suite.protocols) if inputs.suite else list(detector.protocols)
    found = level_rules.levels.protocols_with_level(names, rule["level"])
    cards, baseline_cards = {}, {}
    if found:
        if found[0] not in level_cards:
            level_cards[found[0]] = (
                _scorecards(inputs.sets, found[0]),
                _scorecards(current_sets(baseline), found[0]) if baseline else {},
            )
        cards, baseline_cards = level_cards[found[0]]
    read_once = level_cards.setdefault("read once", {})
    classes = (
        level_rules.classes_of(detector, rule, inputs.suite, splits, read_once)
        if rule["class"] == "*"
        else [rule["class"]]
    )
    out = []
    for split in splits:
        for name in classes:
            outcome = Outcome(
                version=version,
                criteria=inputs.criteria,
                rule_index=index,
                rule=rule,
                split=split,
                class_name=name,
                baseline=baseline,
            )
            out.append(
                level_rules.judge(
                    outcome,
                    rule,
                    split,
                    name,
                    cards.get(split),
                    baseline_cards.get(split),
                    names,
                    read_once,
                )
            )
    return out


def _judge_one(
    version, criteria, index, rule, split, name, card, baseline, baseline_card, bootstraps
):
    tag, where = rule.get("tag"), rule_slices.of(rule)
    problem = base_problem = None
    if where is None:
        value = _value(card, rule["metric"], name)
        base_value = _value(baseline_card, rule["metric"], name)
    else:
        cache = bootstraps.setdefault("slices", {})
        value, problem = (
            (None, None) if card is None else rule_slices.measure(card, rule, name, cache)
        )
        base_value, base_problem = (
            (None, None)
            if baseline_card is None or rule["kind"] == "min_value"
            else rule_slices.measure(baseline_card, rule, name, cache)
        )
    outcome = Outcome(
        version=version,
        criteria=criteria,
        rule_index=index,
        rule=rule,
        split=split,
        class_name=name,
        value=value,
        baseline_value=base_value,
        baseline=baseline,
    )
    label = f"{rule['metric']} of {name}" + (where.label if where else "") + f" on {split}"
    if card is None:
        outcome.status, outcome.detail = Outcome.Status.MISSING, f"no predictions on {split}"
        return outcome
    shared = _shared(card, name, bootstraps) or _shared(baseline_card, name, bootstraps)
    if shared:  # never one category picked silently; missing keeps the verdict incomplete
        outcome.status, outcome.detail = (
            Outcome.Status.MISSING,
            f"{label}: cannot be judged, {shared}",
        )
        return outcome
    for found, whose in ((problem, ""), (base_problem, "baseline: ")):
        if found:
            outcome.status, outcome.detail = found[0], f"{label}: {whose}{found[1]}"
            return outcome
    if value is None:
        why = _why_unmeasured(card, name, where, bootstraps)
        return unmeasured(outcome, label, why, base_value)
    if rule["kind"] == "min_value":
        ok = value >= rule["threshold"]
        outcome.status = Outcome.Status.PASS if ok else Outcome.Status.FAIL
        outcome.detail = f"{label} = {value:.3f}, minimum {rule['threshold']:.3f}"
        return outcome
    if baseline_card is None or base_value is None:
        outcome.status = Outcome.Status.NO_DATA
        outcome.detail = f"{label}: no baseline scored on this split"
        if baseline_card is not None:
            note = "" if where else selectors.absent_note(baseline_card, name, bootstraps)
            outcome.detail = f"{label}: not measured for the baseline{note}"
        return outcome
    drop = base_value - value
    tolerance = rule["tolerance"] / 100
    if rule["kind"] == "max_drop":
        outcome.status = Outcome.Status.FAIL if drop > tolerance else Outcome.Status.PASS
        outcome.detail = (
            f"{label}: {base_value:.3f} → {value:.3f} (drop {100 * drop:.2f} points, "
            f"allowed {rule['tolerance']:.2f})"
        )
        return outcome
    key = (split.pk, tag, rule.get("size"), rule["confidence"])
    if key not in bootstraps:
        try:
            bootstraps[key] = _intervals(
                card, baseline_card, tag, rule["confidence"], size=rule.get("size")
            )
        except rule_slices.SliceUnavailable as e:
            outcome.status, outcome.detail = Outcome.Status.MISSING, f"{label}: {e}"
            return outcome
    found = bootstraps[key]
    interval = found[name if name == "mean" else row_of(found, name)]
    outcome.low, outcome.high = interval.low, interval.high
    outcome.status = significance_status(drop, interval.high < 0, tolerance)
    outcome.detail = (
        f"{label}: Δ {value - base_value:+.3f}, {100 * rule['confidence']:.0f} % interval "
        f"[{interval.low:+.3f}, {interval.high:+.3f}]"
    )
    return outcome


def _why_unmeasured(card, name, where, cache):
    """The engine's reason the card has no number for ``name`` (a class, or ``mean``):
    its own, or for the mean the undefined AP of a class (``UNDEFINED_AP``: a mean
    over classes the metric leaves undefined is no "nothing to measure"). A tag or
    size slice reads the whole split's reason: a class undefined on the split is
    undefined on its slices."""
    reasons = selectors.absent_reasons(card, cache)
    if name == "mean":
        why = UNDEFINED_AP if UNDEFINED_AP in reasons.values() else None
    else:
        why = reasons.get(row_of(reasons, name))
    if where is not None and why is not None:
        return f"on the whole split: {why}" if why != UNDEFINED_AP else why
    return why


def unmeasured(outcome, label, why, base_value):
    """The outcome of a rule whose candidate has no number. *No data* (it passes) only
    where there is nothing to measure; where the class is measurable — the baseline has
    the number, or the engine says the metric is undefined on boxes that count
    (``engine.provenance.UNDEFINED_AP``) — the rule cannot be judged: *missing*, so
    the verdict is incomplete and only a lead's override with a written reason can
    approve it."""
    note = f" ({why})" if why else ""
    if base_value is None and why != UNDEFINED_AP:
        outcome.status, outcome.detail = Outcome.Status.NO_DATA, f"{label}: not measured{note}"
        return outcome
    had = "" if base_value is None else f"; the baseline has {base_value:.3f}"
    outcome.status = Outcome.Status.MISSING
    outcome.detail = f"{label}: cannot be judged, not measured for this version{note}{had}"
    return outcome


def significance_status(worse, significant, tolerance):
    """The no-significant-drop rule's decision, for every metric and slice (level rules
    too): it fails only when the change for the worse is statistically real (the
    interval excludes 0 on the bad side) *and* beyond the tolerance; a drop the interval
    does not confirm reads "not significant"; anything else passes."""
    if significant and worse > tolerance:
        return Outcome.Status.FAIL
    if worse > 0 and not significant:
        return Outcome.Status.NOT_SIGNIFICANT
    return Outcome.Status.PASS
