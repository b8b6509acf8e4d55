"""Benchmark suites: what a detector's candidates must be scored on, and how.

A suite: ``{"splits": [{"name": "bay-night", "revision": null}, ...], "protocols":
["coco", ...], "box_policy": "keep"|"clip"|"reject", "unknown_classes": "drop"|"reject",
"score_threshold": 0.5, "class_thresholds": {"pedestrian": 0.4}}``.
``class_thresholds`` keys name the detector's classes in any case
(``class_thresholds``: the one place that matches them).
``unknown_classes``: detections of classes a split does not list are dropped (the
default, as pycocotools: never scored, counted and named in the result) or the upload
is refused (``evaluation.services.input_policy``). A split with ``revision`` null follows
the split's newest revision; a number pins it. The first protocol is the primary one
(the criteria and the headline read it). Every change is a new, audited version; the
detector's ``protocols`` / ``primary_protocol`` columns mirror the current one.
"""

from django.core.exceptions import PermissionDenied
from django.db import transaction

from evaluation import engine
from evaluation import protocols as stored_protocols
from evaluation.models import BenchmarkSplit
from evaluation.protocols import resolve as resolve_protocol
from evaluation.services import UploadError

from . import audit, class_thresholds, selectors
from .class_thresholds import threshold_of
from .models import AuditEvent, BenchmarkSuite, Detector, Membership

FIELDS = (
    "splits",
    "protocols",
    "box_policy",
    "unknown_classes",
    "score_threshold",
    "class_thresholds",
)


class SuiteError(UploadError):
    """A suite that cannot be used; the message names the field."""


def _fail(path, message):
    raise SuiteError(f"{path}: {message}", path=path)


def _threshold(value, path):
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 <= value <= 1:
        _fail(path, f"must be a number in [0, 1], got {value!r}")
    return float(value)


def validate_suite(detector, spec):
    """A checked, normalised suite; errors name the field (``splits[1].revision``)."""
    if not isinstance(spec, dict):
        _fail("suite", "must be an object")
    for key in spec:
        if key not in FIELDS:
            _fail(key, f"unknown field; allowed: {', '.join(FIELDS)}")
    splits = spec.get("splits")
    if not isinstance(splits, list) or not splits:
        _fail("splits", "must be a non-empty list of {name, revision}")
    known = {}
    for name, revision in BenchmarkSplit.objects.values_list("name", "revision"):
        known.setdefault(name, set()).add(revision)
    clean_splits, seen = [], set()
    for i, entry in enumerate(splits):
        if isinstance(entry, str):  # "bay-night" or "bay-night:2"
            name, _, rev = entry.partition(":")
            entry = {"name": name, "revision": int(rev) if rev.isdigit() else rev or None}
        if not isinstance(entry, dict):
            _fail(f"splits[{i}]", "must be an object {name, revision}")
        for key in entry:
            if key not in ("name", "revision"):
                _fail(f"splits[{i}].{key}", "unknown field; allowed: name, revision")
        name, revision = entry.get("name"), entry.get("revision")
        if not isinstance(name, str) or name not in known:
            _fail(f"splits[{i}].name", f"{name!r} is not a benchmark split")
        pinned = isinstance(revision, int) and not isinstance(revision, bool)
        if revision is not None and (not pinned or revision not in known[name]):
            revisions = ", ".join(str(r) for r in sorted(known[name]))
            _fail(
                f"splits[{i}].revision",
                f"{name} has no revision {revision!r} (revisions: {revisions}; null = newest)",
            )
        if name in seen:
            _fail(f"splits[{i}].name", f"{name} is listed twice")
        seen.add(name)
        clean_splits.append({"name": name, "revision": revision})
    protocols, custom = _protocols(spec.get("protocols", [detector.primary_protocol]))
    box_policy = spec.get("box_policy", "keep")
    if box_policy not in BenchmarkSuite.BoxPolicy.values:
        _fail("box_policy", f"must be one of {', '.join(BenchmarkSuite.BoxPolicy.values)}")
    unknown_classes = spec.get("unknown_classes", "drop")
    if unknown_classes not in BenchmarkSuite.UnknownClasses.values:
        _fail(
            "unknown_classes",
            f"must be one of {', '.join(BenchmarkSuite.UnknownClasses.values)}",
        )
    score_threshold = _threshold(spec.get("score_threshold", 0.5), "score_threshold")
    clean_thresholds = class_thresholds.validate(
        detector, spec.get("class_thresholds") or {}, _threshold, _fail
    )
    return {
        "splits": clean_splits,
        "protocols": protocols,
        "box_policy": box_policy,
        "unknown_classes": unknown_classes,
        "score_threshold": score_threshold,
        "class_thresholds": clean_thresholds,
        "custom_protocols": custom,
    }


def _protocols(entries):
    """Names of a suite's protocols, and {name: definition} of its custom ones. An entry
    is a preset's name, a stored custom protocol's name, or a custom protocol's
    definition (``engine.protocol_from_dict`` keys, checked by the engine; errors name
    ``protocols[i].field``), stored under its name when the suite is saved."""
    if not isinstance(entries, list) or not entries:
        _fail("protocols", "must be a non-empty list of protocol names or definitions")
    names, custom = [], {}
    for i, entry in enumerate(entries):
        path = f"protocols[{i}]"
        try:
            if isinstance(entry, str):
                resolve_protocol(entry)
                name = entry
            elif isinstance(entry, dict):
                name = stored_protocols.check_definition(entry, path).name
                custom[name] = entry
            else:
                _fail(path, "must be a protocol's name or a custom protocol's definition")
        except engine.InputError as e:
            _fail(f"{path}.{e.field}" if e.field else path, e.message)
        if name in names:
            _fail(path, f"{name!r} is listed twice")
        if i == 0 and stored_protocols.not_primary(name):
            _fail(path, stored_protocols.not_primary(name))
        names.append(name)
    stored = stored_protocols.definitions([n for n in names if n not in custom])
    known = {**stored, **custom}
    return names, {name: known[name] for name in names if name in known}


def current_suite(detector):
    """The detector's newest suite (every detector has one from its creation)."""
    return detector.suites.order_by("-number").first()


def as_dict(suite):
    return {field: getattr(suite, field) for field in FIELDS}


def custom_definitions(suite):
    """{name: definition} of the custom protocols a suite version names."""
    return stored_protocols.definitions(suite.protocols) if suite else {}


def set_suite(detector, user, spec):
    """A new version of the detector's suite (leads only), audited; undecided candidates
    are judged again once it commits."""
    if selectors.role_in(user, detector.team) != Membership.Role.LEAD:
        raise PermissionDenied(f"{user} may not change the suite of {detector}: leads only")
    clean = validate_suite(detector, spec)
    with transaction.atomic():
        Detector.objects.select_for_update().filter(pk=detector.pk).first()
        suite = _create_audited(detector, user, clean)
        from .judging_queue import rejudge_later

        rejudge_later(detector.pk)
    return suite


def _create_audited(detector, user, clean):
    """The one writer of suite versions: the row and its audit event, in the caller's
    transaction."""
    clean = dict(clean)
    custom = clean.pop("custom_protocols", None) or {}
    for definition in custom.values():
        stored_protocols.store(definition, getattr(user, "username", "system"))
    suite = _create(detector, user, clean)
    if custom:
        clean["custom_protocols"] = custom  # the definitions, in the audit trail
    audit.record_event(
        AuditEvent.Kind.SUITE_CHANGED,
        user or "system",
        f"detector:{detector.pk}",
        {"detector": str(detector), "number": suite.number, "suite": clean},
    )
    return suite


def _create(detector, user, clean):
    last = current_suite(detector)
    suite = BenchmarkSuite.objects.create(
        detector=detector, number=(last.number + 1 if last else 1), created_by=user, **clean
    )
    # The mirror older readers use (headline protocol, upload page).
    Detector.objects.filter(pk=detector.pk).update(
        protocols=clean["protocols"], primary_protocol=clean["protocols"][0]
    )
    detector.protocols, detector.primary_protocol = clean["protocols"], clean["protocols"][0]
    return suite


def reissue(detector, user, change):
    """A new suite version with the current one's content, for a change of what
    candidates are judged on kept outside the suite (``detectors.set_classes``): the
    judgements name their suite, so the standing ones no longer match. Audited as a
    suite change, with ``change`` in the payload; the caller holds the detector's row
    lock and queues re-judging."""
    clean = as_dict(current_suite(detector))
    suite = _create(detector, user, clean)
    audit.record_event(
        AuditEvent.Kind.SUITE_CHANGED,
        user or "system",
        f"detector:{detector.pk}",
        {"detector": str(detector), "number": suite.number, "suite": clean, **change},
    )
    return suite


def first_suite(detector, user=None, *, protocols=("coco",), splits=(), clean=None):
    """Suite v1 of a new detector (``services.create_detector``), audited: ``clean`` (a
    validated suite) or one built from ``protocols`` and split names."""
    if clean is None:
        clean = {
            "splits": [{"name": n, "revision": None} for n in splits],
            "protocols": list(protocols),
            "box_policy": "keep",
            "unknown_classes": "drop",
            "score_threshold": 0.5,
            "class_thresholds": {},
        }
    return _create_audited(detector, user, clean)


def resolve(entries):
    """The BenchmarkSplit rows of suite entries: a pinned revision, or the newest."""
    names = {e["name"] for e in entries}
    rows = {}
    for split in BenchmarkSplit.objects.filter(name__in=names):
        rows.setdefault(split.name, {})[split.revision] = split
    return resolve_from(entries, rows)


def resolve_from(entries, rows):
    """``resolve`` over rows already read: ``rows[name][revision]`` = BenchmarkSplit."""
    out = []
    for entry in entries:
        revisions = rows.get(entry["name"], {})
        if not revisions:
            continue
        revision = entry["revision"] if entry["revision"] is not None else max(revisions)
        if revision in revisions:
            out.append(revisions[revision])
    return out


def required_splits(detector):
    """The splits a candidate of ``detector`` must be scored on, in the suite's order."""
    suite = current_suite(detector)
    return resolve(suite.splits) if suite else []


def deployed_threshold(detector, class_name=None):
    """THE deployed score threshold of a detector's class, from its current suite: what
    every operating-point number (precision, recall, F1, a confusion matrix) at "the
    deployed threshold" must cut at. ``class_name`` None: the detector-wide value."""
    return threshold_of(current_suite(detector), class_name)


def deployed_thresholds(suite, classes):
    """[(class, threshold, overridden)] of ``classes`` under ``suite``, for the pages."""
    return class_thresholds.listed(suite, classes)


def deployed_operating_point(card, suite):
    r"""Precision, recall and F1 of a scorecard's detections at the suite's deployed
    score threshold(s), per class and pooled over classes, from its match records:

    .. math:: P = \frac{TP}{TP + FP}, \quad R = \frac{TP}{n_{pos}}, \quad
              F_1 = \frac{2\,TP}{TP + FP + n_{pos}}

    counting the detections with score >= the class's threshold (``class_thresholds``,
    else ``score_threshold``) at the primary IoU slot, after the protocol's detection
    cap (common practice; ``engine.operating_point.threshold_scores``). A class takes
    its threshold by name in any case (``class_thresholds.thresholds_of``, by the
    categories' own names). The pooled row sums TP, FP and positives over the classes,
    each at its own threshold.
    """
    from evaluation.engine.curves import cumulative_counts
    from evaluation.engine.operating_point import (
        counts_at,
        scores_from_counts,
        threshold_scores,
    )

    from .delta_intervals import _records

    records = _records(card)
    protocol = resolve_protocol(card.protocol)
    curves = cumulative_counts(records, max_detections=protocol.max_detections_limit)
    cuts = class_thresholds.thresholds_of(
        suite, list(records.classes), class_thresholds.own_names(card, records)
    )
    per_class, tp_all, fp_all = {}, 0.0, 0.0
    for k, (name, threshold) in enumerate(zip(records.classes, cuts)):
        tp, fp, scores = curves.segment(k)
        per_class[name] = threshold_scores(tp, fp, scores, float(curves.n_pos[k]), threshold)
        kept_tp, kept_fp = counts_at(tp, fp, scores, threshold)
        tp_all, fp_all = tp_all + kept_tp, fp_all + kept_fp
    pooled = scores_from_counts(tp_all, fp_all, float(curves.n_pos.sum()), suite.score_threshold)
    pooled["threshold"] = None if suite.class_thresholds else suite.score_threshold
    return {"per_class": per_class, "pooled": pooled}
