"""Release rules on a level protocol's level or setup (``"level": "moderate"``).

A rule with ``level`` is judged on the scorecard of the suite's level protocol that
holds that level (``evaluation.levels``; ``kitti2d``: easy / moderate / hard, metric
``AP`` = AP over 40 recall positions, higher is better). A lower-is-better metric (a
miss-rate setup, ``miss_rate``) turns the rule's direction: ``min_value`` then means "at most
the threshold" and a *drop* is a rise. Every rule kind applies: ``min_value``,
``max_drop`` and ``no_significant_drop`` (the paired image bootstrap of
``delta_intervals._intervals``: the same draws, seed and pairing by image, over the level's
per-image samples, ``engine.level_samples``). A ``tag`` judges the level on the tag's
images only (image weights 0/1, every kind). A level sets its own box heights, so a
``size`` is refused.

Values with a tag or a bootstrap are recomputed from the scorecard's stored samples
(``evaluation.levels.load_samples``, digest-checked); a scorecard stored before the
samples were kept, or whose file changed, is a *missing* outcome saying to re-score,
never a pass.

A level result that is not there — the suite names no protocol with the level, or its
evaluation has no scorecard on the split — is a *missing* outcome, which keeps the
verdict from passing (``judging._compute``).
"""

import numpy as np
from django.conf import settings

from evaluation import levels
from evaluation.engine.data import name_key
from evaluation.services import load_truth_of

from .class_thresholds import of_class, row_of, rows_naming, same_class, shared_note
from .models import Outcome

KINDS = ("min_value", "max_drop", "no_significant_drop")


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
        fail(index, "kind", f"a level rule is one of {', '.join(KINDS)}")
    if rule.get("size"):
        fail(index, "size", "a level sets its own box heights; it cannot name a size bucket")
    clean["metric"] = metric
    clean["level"] = level
    return clean


def classes_of(detector, rule, suite, splits=(), cache=None):
    """The classes a ``*`` level rule covers: the detector's classes its protocol
    evaluates (case-insensitive), else all of them. On a split whose categories share a
    name (shown ``Car (id 1)``, ``Car (id 2)``), a detector class named as shown is
    covered when its category's own name is one the protocol evaluates."""
    found = levels.protocols_with_level(_names(detector, suite), rule["level"])
    if not found:
        return list(detector.classes)
    own = {name_key(c) for c in levels.get(found[0]).classes}
    cache = {} if cache is None else cache
    renamed = [table for s in splits if (table := _renamed(s, cache))]

    def covered(name):
        if name_key(name) in own:
            return True
        return any(table[name_key(name)][0] in own for table in renamed if name_key(name) in table)

    return [c for c in detector.classes if covered(c)] or list(detector.classes)


def _renamed(split, cache):
    """For a split some of whose categories share a name (the loader shows them as
    ``Car (id 1)``, ``Car (id 2)``; ``annotations_left_out.categories_renamed``):
    ``{name: (own name, the shown names of every category of that own name)}`` for
    each shown and own name, compared as ``name_key``. None for any other split (its
    ground truth is not read)."""
    if not (split.annotations_left_out or {}).get("categories_renamed"):
        return None
    key = ("renamed", split.pk)
    if key not in cache:
        truth = load_truth_of(split)
        table = {}
        for own in truth.category_names:
            group = frozenset(name_key(truth.classes[k]) for k in truth.classes_named(own))
            table.setdefault(name_key(own), (name_key(own), group))
        for shown, own in zip(truth.classes, truth.category_names):
            table[name_key(shown)] = table[name_key(own)]
        cache[key] = table
    return cache[key]


def stored_name(keys, name, split, cache):
    """The key under which a level result (``keys``: its classes, or its samples')
    keeps ``name``'s class. ``kitti2d`` evaluates categories sharing an own name as one
    class, as the devkit reads label lines of that name, keyed by the first one's shown
    name (``engine.difficulty``): ``Car`` or ``Car (id 2)`` is kept as ``Car (id 1)``.
    A name matching a key (case-insensitive) is that key; one matching none, or more
    than one key of its own name (the miss-rate setups keep such categories apart), is
    returned as given (not measured)."""
    if name == "mean":
        return name
    if row_of(keys, name) is not None:
        return row_of(keys, name)
    if len(rows_naming(keys, name)) > 1:
        return name  # two categories naming it in any case: judge() says so
    table = _renamed(split, cache)
    entry = table.get(name_key(name)) if table else None
    if entry is None:
        return name
    hits = [k for k in keys if name_key(k) in entry[1]]
    return hits[0] if len(hits) == 1 else name


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
    return (of_class(entry["classes"], name) or {}).get(key)  # in any case (name_key)


def judge(outcome, rule, split, name, card, baseline_card, suite_names, cache):
    """Fill ``outcome`` (status, values, detail, interval) for one split and class.
    ``cache`` is a dict kept for one judging (samples, tag masks and bootstraps read once)."""
    level, tag = rule["level"], rule.get("tag")
    found = levels.protocols_with_level(suite_names, level)
    where = f" at {level}" + (f", tag {tag}," if tag else "")
    label = f"{rule['metric']} of {name}{where} on {split}"
    if not found:
        outcome.status = Outcome.Status.MISSING
        outcome.detail = f"{label}: the suite names no protocol with level {level!r}"
        return outcome
    protocol = levels.get(found[0])
    label = f"{rule['metric']} of {name}{where} ({protocol.name}) on {split}"
    if card is None:
        outcome.status = Outcome.Status.MISSING
        outcome.detail = f"{label}: no {protocol.name} result on {split}"
        return outcome
    entry = card.result["levels"].get(level)
    shared = shared_note(entry["classes"] if entry else (), name) if name != "mean" else None
    if shared:  # never one category picked silently; missing keeps the verdict incomplete
        outcome.status, outcome.detail = (
            Outcome.Status.MISSING,
            f"{label}: cannot be judged, {shared}",
        )
        return outcome
    stored = stored_name(entry["classes"] if entry else (), name, split, cache)
    if not same_class(stored, name):
        merged = f"{name} (one class with {stored!r})"
        label = f"{rule['metric']} of {merged}{where} ({protocol.name}) on {split}"
    if tag or rule["kind"] == "no_significant_drop":
        return _judge_on_samples(outcome, rule, split, stored, card, baseline_card, label, cache)
    value = value_of(card, level, stored)
    base_value = value_of(baseline_card, level, stored)
    return _compare(outcome, rule, protocol.lower_is_better, value, base_value, label)


def _compare(outcome, rule, lower, value, base_value, label):
    """min_value and max_drop on the two numbers (None: not measured)."""
    outcome.value, outcome.baseline_value = value, base_value
    if value is None:
        from .rule_outcomes import unmeasured

        return unmeasured(outcome, label, None, base_value)
    if rule["kind"] == "min_value":
        ok = value <= rule["threshold"] if lower else value >= rule["threshold"]
        outcome.status = Outcome.Status.PASS if ok else Outcome.Status.FAIL
        bound = "maximum" if lower else "minimum"
        outcome.detail = f"{label} = {value:.3f}, {bound} {rule['threshold']:.3f}"
        return outcome
    if base_value is None:
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


def _samples(card, cache):
    """The scorecard's samples once per judging, or the ``SamplesUnavailable`` raised."""
    key = ("samples", card.pk, card.records_sha256)
    if key not in cache:
        try:
            cache[key] = levels.load_samples(card)
        except levels.SamplesUnavailable as e:
            cache[key] = e
    if isinstance(cache[key], Exception):
        raise cache[key]
    return cache[key]


def _mask(split, tag, n_images, cache):
    """0/1 image weights of ``tag`` on ``split`` (None: no tag); the split's image order
    is the samples' (both come from the frozen split)."""
    if not tag:
        return None
    key = ("tag", split.pk, tag)
    if key not in cache:
        mask = load_truth_of(split).tag_mask(tag).astype(np.int64)
        if mask.shape != (n_images,):
            raise levels.SamplesUnavailable(
                f"the samples hold {n_images} images, the split {mask.shape[0]}; re-score"
            )
        cache[key] = mask
    return cache[key]


def _judge_on_samples(outcome, rule, split, name, card, baseline_card, label, cache):
    """A tag rule or a significance rule, from the stored per-image samples."""
    level, tag, kind = rule["level"], rule.get("tag"), rule["kind"]
    lower = levels.get(card.protocol).lower_is_better
    try:
        samples = _samples(card, cache)
        base = None
        if baseline_card is not None and kind != "min_value":
            try:
                base = _samples(baseline_card, cache)
            except levels.SamplesUnavailable as e:
                raise levels.SamplesUnavailable(f"baseline: {e}") from e
        mask = _mask(split, tag, samples.n_images, cache)
    except levels.SamplesUnavailable as e:
        outcome.status, outcome.detail = Outcome.Status.MISSING, f"{label}: {e}"
        return outcome
    if mask is not None and not mask.any():
        outcome.status = Outcome.Status.NO_DATA
        outcome.detail = f"{label}: no image of {split} carries tag {tag!r}"
        return outcome
    position = levels.class_position(samples, name)
    if position is None:
        outcome.status, outcome.detail = Outcome.Status.NO_DATA, f"{label}: not measured"
        return outcome

    def number(values):
        return None if np.isnan(values[position]) else float(values[position])

    value = number(levels.level_values(samples, level, mask))
    base_value = None if base is None else number(levels.level_values(base, level, mask))
    if kind != "no_significant_drop":
        return _compare(outcome, rule, lower, value, base_value, label)
    outcome.value, outcome.baseline_value = value, base_value
    if value is None:
        from .rule_outcomes import unmeasured

        return unmeasured(outcome, label, None, base_value)
    if base is None or base_value is None:
        outcome.status = Outcome.Status.NO_DATA
        outcome.detail = f"{label}: no baseline scored on this split"
        return outcome
    # one set of replicates serves every class of a "*" or mean rule; a one-class rule
    # computes its class alone (the same draws: the interval does not depend on it)
    only = None if rule["class"] in ("*", "mean") else samples.classes[position - 1]
    key = ("bootstrap", card.pk, baseline_card.pk, level, tag, rule["confidence"], only)
    if key not in cache:
        cache[key] = _intervals(samples, base, level, mask, rule["confidence"], only)
    interval = cache[key][position]
    outcome.low, outcome.high = interval.low, interval.high
    worse = value - base_value if lower else base_value - value
    significant = interval.low > 0 if lower else interval.high < 0
    from .rule_outcomes import significance_status  # rule_outcomes imports this module

    outcome.status = significance_status(worse, significant, rule["tolerance"] / 100)
    outcome.detail = (
        f"{label}: Δ {value - base_value:+.3f}, {100 * rule['confidence']:.0f} % interval "
        f"[{interval.low:+.3f}, {interval.high:+.3f}]" + (" (lower is better)" if lower else "")
    )
    return outcome


def _intervals(samples, base, level, mask, confidence, only=None):
    r"""Paired-bootstrap intervals of Δ (candidate − baseline) of the level's [mean, each
    class]: the same image draws for both (pairing by image), the seed and number of
    replicates of every significance rule (``delta_intervals._intervals``), restricted to a
    tag's images by multiplying the draws with its 0/1 mask.

    .. math:: \Delta^*_b = S_C(w_b \odot m) - S_B(w_b \odot m)
    """
    from evaluation.engine.bootstrap import paired_bootstrap

    if base.n_images != samples.n_images or base.classes != samples.classes:
        raise ValueError("candidate and baseline samples come from different splits")

    def statistic(of):
        def at(weights):
            w = mask if weights is None else (weights if mask is None else weights * mask)
            return levels.level_values(of, level, w, only)

        return at

    return paired_bootstrap(
        statistic(samples),
        statistic(base),
        samples.n_images,
        n_resamples=settings.BENCHBOOK_BOOTSTRAP_RESAMPLES,
        confidence=confidence,
        seed=settings.BENCHBOOK_BOOTSTRAP_SEED,
        workers=1,
    )
