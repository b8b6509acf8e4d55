"""Release rules on a level protocol's level or setup (``"level": "moderate"``).

A rule with ``level`` is judged on the scorecard of the suite's level protocol that
holds that level (``evaluation.levels``; ``kitti2d``: easy / moderate / hard, metric
``AP`` = AP over 40 recall positions, higher is better). A lower-is-better metric (a
miss-rate setup, ``miss_rate``) turns the rule's direction: ``min_value`` then means "at most
the threshold" and a *drop* is a rise. Only ``min_value`` and ``max_drop``: a
significance rule needs paired match records, which a level result does not keep.

A level result that is not there — the suite names no protocol with the level, or its
evaluation has no scorecard on the split — is a *missing* outcome, which keeps the
verdict from passing (``verdicts._compute``).
"""

from evaluation import levels

from .models import Outcome

KINDS = ("min_value", "max_drop")


def validate(detector, rule, clean, index, fail):
    """Check a rule's ``level`` (and its metric, kind, tag) against the detector's
    current suite; add it to ``clean``. ``fail(index, field, message)`` raises."""
    from .suites import current_suite

    level = rule["level"]
    suite = current_suite(detector)
    names = list(suite.protocols) if suite else list(detector.protocols)
    offered = {
        n: levels.get(n).levels for n in names if levels.get(n) is not None
    }  # level protocols of the suite
    if not isinstance(level, str) or not level:
        fail(index, "level", "must be the name of a level (e.g. 'moderate')")
    found = levels.protocols_with_level(names, level)
    if not found:
        known = "; ".join(f"{n}: {', '.join(lv)}" for n, lv in offered.items())
        fail(
            index,
            "level",
            f"{level!r} is not a level of a protocol in the suite"
            + (f" ({known})" if known else " (it names no level protocol, e.g. kitti2d)"),
        )
    protocol = levels.get(found[0])
    metric = rule.get("metric", protocol.metric)
    if metric != protocol.metric:
        fail(
            index, "metric", f"level {level!r} of {protocol.name} is measured as {protocol.metric}"
        )
    if clean["kind"] not in KINDS:
        fail(
            index,
            "kind",
            "a level rule is min_value or max_drop: a significance rule needs paired match "
            "records, which a level result does not keep",
        )
    if rule.get("tag"):
        fail(index, "tag", "a level rule covers the whole split; it cannot name an image tag")
    if rule.get("size"):
        fail(index, "size", "a level sets its own box heights; it cannot name a size bucket")
    clean["metric"] = metric
    clean["level"] = level
    return clean


def classes_of(detector, rule, suite):
    """The classes a ``*`` level rule covers: the detector's classes its protocol
    evaluates (case-insensitive), else all of them."""
    found = levels.protocols_with_level(_names(detector, suite), rule["level"])
    if not found:
        return list(detector.classes)
    own = {c.lower() for c in levels.get(found[0]).classes}
    return [c for c in detector.classes if c.lower() in own] or list(detector.classes)


def _names(detector, suite):
    return list(suite.protocols) if suite else list(detector.protocols)


def value_of(card, level, name):
    """The rule's number from a level scorecard's stored result (None: not measured)."""
    if card is None:
        return None
    result = card.result
    entry = result["levels"].get(level)
    if entry is None:
        return None
    key = result["value_key"]
    if name == "mean":
        return entry.get(key)
    by_lower = {c.lower(): row for c, row in entry["classes"].items()}
    return by_lower.get(name.lower(), {}).get(key)


def judge(outcome, rule, split, name, card, baseline_card, suite_names):
    """Fill ``outcome`` (status, values, detail) for one split and class."""
    level = rule["level"]
    found = levels.protocols_with_level(suite_names, level)
    label = f"{rule['metric']} of {name} at {level} on {split}"
    if not found:
        outcome.status = Outcome.Status.MISSING
        outcome.detail = f"{label}: the suite names no protocol with level {level!r}"
        return outcome
    protocol = levels.get(found[0])
    label = f"{rule['metric']} of {name} at {level} ({protocol.name}) on {split}"
    if card is None:
        outcome.status = Outcome.Status.MISSING
        outcome.detail = f"{label}: no {protocol.name} result on {split}"
        return outcome
    value = value_of(card, level, name)
    base_value = value_of(baseline_card, level, name)
    outcome.value, outcome.baseline_value = value, base_value
    if value is None:
        outcome.status, outcome.detail = Outcome.Status.NO_DATA, f"{label}: not measured"
        return outcome
    lower = protocol.lower_is_better
    if rule["kind"] == "min_value":
        ok = value <= rule["threshold"] if lower else value >= rule["threshold"]
        outcome.status = Outcome.Status.PASS if ok else Outcome.Status.FAIL
        bound = "maximum" if lower else "minimum"
        outcome.detail = f"{label} = {value:.3f}, {bound} {rule['threshold']:.3f}"
        return outcome
    if baseline_card is None or base_value is None:
        outcome.status = Outcome.Status.NO_DATA
        outcome.detail = f"{label}: no baseline scored on this split"
        return outcome
    worse = value - base_value if lower else base_value - value
    outcome.status = Outcome.Status.FAIL if worse > rule["tolerance"] / 100 else Outcome.Status.PASS
    outcome.detail = (
        f"{label}: {base_value:.3f} → {value:.3f} ({'rise' if lower else 'drop'} "
        f"{100 * worse:.2f} points, allowed {rule['tolerance']:.2f})"
    )
    return outcome
