"""Release criteria: validate a detector's rules, judge a candidate against them.

A rule: ``{"metric": "AP"|"AP50"|"AP75"|"recall", "class": "mean"|"*"|name,
"split": "*"|"name:revision", "tag": optional image tag, or "size": optional size
bucket (``rule_slices``: COCO's small/medium/large or the protocol's own), "kind": one of
"min_value" (with "threshold" on 0-1), "max_drop" (with "tolerance" in AP points,
0-100) or "no_significant_drop" (AP, or a level's metric; "confidence", default 0.95,
and an optional "tolerance" in points)}``. ``"class": "*"`` applies the rule to every
class. An optional ``"level"`` judges a level protocol's level or setup, every kind,
with or without a tag (``level_rules``).

A regression is a *fail* only when the paired-bootstrap interval of the difference
excludes zero on the bad side and the drop exceeds the tolerance; a drop whose interval
holds zero is *not significant*.
"""

import numpy as np
from django.conf import settings
from django.core.exceptions import PermissionDenied
from django.db import transaction

from evaluation.models import BenchmarkSplit, ClassScore
from evaluation.services import UploadError, load_records, load_truth_of

from . import audit, level_rules, rule_slices, selectors
from .models import AuditEvent, Membership, Outcome, ReleaseCriteria

METRICS = {"AP": "ap", "AP50": "ap50", "AP75": "ap75", "recall": "recall"}
KINDS = ("min_value", "max_drop", "no_significant_drop")


class CriteriaError(UploadError):
    """A rule that cannot be used; the message names the rule and the field."""


def _fail(index, field, message):
    raise CriteriaError(
        f"rule {index + 1}: field '{field}': {message}", path=f"rules[{index}].{field}"
    )


def _number(rule, index, field, low, high, default=None):
    value = rule.get(field, default)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not low <= value <= high:
        _fail(index, field, f"must be a number in [{low}, {high}], got {value!r}")
    return float(value)


def _storable_text(value, path):
    """Refuse strings a database cannot keep: PostgreSQL refuses NUL in text, and UTF-8
    has no encoding for a lone surrogate (common practice)."""
    if isinstance(value, dict):
        for key, item in value.items():
            _storable_text(key, path)
            _storable_text(item, f"{path}.{key}")
    elif isinstance(value, list):
        for i, item in enumerate(value):
            _storable_text(item, f"{path}[{i}]")
    elif isinstance(value, str) and any(c == "\x00" or "\ud800" <= c <= "\udfff" for c in value):
        raise CriteriaError(f"{path}: NUL and surrogate characters are not allowed", path=path)


def validate_rules(detector, rules):
    """Checked, normalised rules; errors name the rule and the field."""
    if not isinstance(rules, list) or not rules:
        raise CriteriaError("criteria must be a non-empty list of rules", path="rules")
    _storable_text(rules, "rules")
    splits = {f"{s.name}:{s.revision}" for s in BenchmarkSplit.objects.all()}
    known = {
        "metric",
        "class",
        "split",
        "tag",
        "size",
        "kind",
        "threshold",
        "tolerance",
        "confidence",
        "level",  # a level protocol's level or setup (level_rules.py)
    }
    protocols = _judging_protocols(detector)
    out = []
    for i, rule in enumerate(rules):
        if not isinstance(rule, dict):
            raise CriteriaError(f"rule {i + 1}: must be an object", path=f"rules[{i}]")
        for key in rule:
            if key not in known:
                _fail(i, key, f"unknown field; allowed: {', '.join(sorted(known))}")
        kind = rule.get("kind")
        if kind not in KINDS:
            _fail(i, "kind", f"must be one of {', '.join(KINDS)}, got {kind!r}")
        metric = rule.get("metric", "AP")
        if "level" not in rule and metric not in METRICS:
            _fail(i, "metric", f"must be one of {', '.join(METRICS)}, got {metric!r}")
        if kind == "no_significant_drop" and metric != "AP" and "level" not in rule:
            _fail(i, "metric", "a significance rule is computed on AP")
        name = rule.get("class", "mean")
        if name not in ("mean", "*", *detector.classes):
            _fail(
                i, "class", f"{name!r} is not 'mean', '*' or one of {', '.join(detector.classes)}"
            )
        split = rule.get("split", "*")
        if split != "*" and split not in splits:
            _fail(i, "split", f"{split!r} is not a benchmark split (use name:revision or '*')")
        clean = {"kind": kind, "metric": metric, "class": name, "split": split}
        rule_slices.validate(rule, i, clean, protocols, _fail)
        if kind == "min_value":
            clean["threshold"] = _number(rule, i, "threshold", 0.0, 1.0)
        else:
            clean["tolerance"] = _number(
                rule,
                i,
                "tolerance",
                0.0,
                100.0,
                default=0.0 if kind == "no_significant_drop" else None,
            )
        if kind == "no_significant_drop":
            clean["confidence"] = _number(rule, i, "confidence", 0.5, 0.999, default=0.95)
        if "level" in rule:
            clean = level_rules.validate(detector, rule, clean, i, _fail)
        out.append(clean)
    return out


def _judging_protocols(detector):
    """The protocols a rule may be judged under: the suite's first (the judging one) and
    the detector's primary protocol."""
    from .suites import current_suite

    suite = current_suite(detector)
    return [*(suite.protocols[:1] if suite else []), detector.primary_protocol]


def set_criteria(detector, user, rules):
    """A new version of the detector's criteria (leads only), audited."""
    if selectors.role_in(user, detector.team) != Membership.Role.LEAD:
        raise PermissionDenied(f"{user} may not change the criteria of {detector}: leads only")
    clean = validate_rules(detector, rules)
    with transaction.atomic():
        last = detector.criteria.order_by("-number").first()
        criteria = ReleaseCriteria.objects.create(
            detector=detector, number=(last.number + 1 if last else 1), rules=clean, created_by=user
        )
        audit.record_event(
            AuditEvent.Kind.CRITERIA_CHANGED,
            user,
            f"detector:{detector.pk}",
            {"detector": str(detector), "number": criteria.number, "rules": clean},
        )
        from .judging_queue import rejudge_later

        rejudge_later(detector.pk)
    return criteria


def current_criteria(detector):
    return detector.criteria.order_by("-number").first()


def _scorecards(sets, protocol):
    """{split: Scorecard} of these prediction sets' own finished evaluations under
    ``protocol`` (``selectors._scorecards``)."""
    sets = list(sets)
    cards = selectors._scorecards(sets, [protocol])
    return {ps.split: cards[(ps.pk, protocol)] for ps in sets if (ps.pk, protocol) in cards}


def _value(card, metric, name):
    if card is None:
        return None
    row = ClassScore.objects.filter(
        scorecard=card, class_name="" if name == "mean" else name
    ).first()
    return getattr(row, METRICS[metric]) if row else None


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
    for found, whose in ((problem, ""), (base_problem, "baseline: ")):
        if found:
            outcome.status, outcome.detail = found[0], f"{label}: {whose}{found[1]}"
            return outcome
    if value is None:
        note = "" if where else selectors.absent_note(card, name, bootstraps)
        outcome.status, outcome.detail = Outcome.Status.NO_DATA, f"{label}: not measured{note}"
        return outcome
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
    interval = bootstraps[key][name]
    outcome.low, outcome.high = interval.low, interval.high
    outcome.status = significance_status(drop, interval.high < 0, tolerance)
    outcome.detail = (
        f"{label}: Δ {value - base_value:+.3f}, {100 * rule['confidence']:.0f} % interval "
        f"[{interval.low:+.3f}, {interval.high:+.3f}]"
    )
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
