"""Release criteria: validate a detector's rules and store them as a new version.

A rule: ``{"metric": "AP"|"AP50"|"AP75"|"recall", "class": "mean"|"*"|name,
"split": "*"|"name:revision", "tag": optional image tag, or "size": optional size
bucket (``rule_slices``: COCO's small/medium/large or the protocol's own), "kind": one of
"min_value" (with "threshold" on 0-1), "max_drop" (with "tolerance" in AP points,
0-100) or "no_significant_drop" (AP, or a level's metric; "confidence", default 0.95,
and an optional "tolerance" in points)}``. ``"class": "*"`` applies the rule to every
class. The class is read in any case (``class_of``: ``Pedestrian`` names the class
``pedestrian``, ``MEAN`` the mean) and stored as the detector spells it. An optional
``"level"`` judges a level protocol's level or setup, every kind, with or without a tag
(``level_rules``).

A candidate is judged against them in ``rule_outcomes``.
"""

from django.core.exceptions import PermissionDenied
from django.db import transaction

from evaluation.engine.data import name_key
from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError

from . import audit, level_rules, rule_slices, selectors
from .class_thresholds import spelled
from .models import AuditEvent, Membership, ReleaseCriteria

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
        name = class_of(detector, rule.get("class", "mean"))
        if name is None:
            _fail(
                i,
                "class",
                f"{rule['class']!r} is not 'mean', '*' or one of {', '.join(detector.classes)}",
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


def class_of(detector, name):
    """What a rule's ``class`` names, in any case (``name_key``, as every rule reads a
    class): ``"mean"`` or ``"*"`` (the rule words, ``detectors.reserved``: stripped, any
    case), else the detector's class in its own spelling (the exact one first, for a
    detector stored with two spellings of one class before they were refused); None
    when it names none."""
    from .detectors import RESERVED, reserved

    if reserved(name):
        return next(word for word in RESERVED if word == name_key(name.strip()))
    return spelled(detector.classes, name)


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
