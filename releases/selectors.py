"""Reads that pages need: what a user may see, and the data of each page.

Every function here does a fixed number of queries, whatever the number of versions.
"""

import numpy as np

from .models import Detector, Membership, PredictionSet, Team

UPLOAD_ROLES = (Membership.Role.ENGINEER, Membership.Role.LEAD)

# Shown beside every release decision and in evidence reports (releases/client keeps a
# copy: it imports nothing of the project).
CAUTION = (
    "Benchmark metrics support, and do not replace, the safety validation of a perception "
    "system under the applicable standards (for example ISO 26262, ISO 21448, UL 4600) and "
    "your organisation's release process."
)


def reads_all_teams(user):
    """Safety review is cross-team: a reviewer role anywhere (or a superuser) reads all."""
    return user.is_superuser or (
        Membership.objects.filter(user=user, role=Membership.Role.REVIEWER).exists()
    )


def visible_teams(user):
    """Members see their teams; anyone holding a reviewer role reads every team."""
    if not user.is_authenticated:
        return Team.objects.none()
    if reads_all_teams(user):
        return Team.objects.all()
    return Team.objects.filter(memberships__user=user)


def visible_detectors(user):
    return Detector.objects.filter(team__in=visible_teams(user)).select_related("team")


def role_in(user, team):
    membership = Membership.objects.filter(user=user, team=team).first()
    return membership.role if membership else None


def detector_for(user, detector_id):
    """The detector if ``user`` may see it, else ``Detector.DoesNotExist``."""
    return visible_detectors(user).get(pk=detector_id)


def version_for(user, version_id):
    """A version of a visible detector, else ``ModelVersion.DoesNotExist``."""
    from .models import ModelVersion

    return ModelVersion.objects.select_related(
        "detector__team", "created_by", "sign_off__decided_by"
    ).get(pk=version_id, detector__in=visible_detectors(user))


def evaluations_of(version):
    """Every evaluation of a version's prediction sets, with its split and file (2 queries)."""
    from evaluation.models import Evaluation

    sets = list(version.prediction_sets.current())
    pairs = {(ps.predictions_id, ps.split_id) for ps in sets}
    found = (
        Evaluation.objects.filter(
            predictions_id__in={p for p, _ in pairs}, split_id__in={s for _, s in pairs}
        )
        .select_related("split", "predictions")
        .order_by("split__name", "split__revision", "protocol")
    )
    return [e for e in found if (e.predictions_id, e.split_id) in pairs]


def evaluation_for(user, evaluation_id):
    """An evaluation the user may see: one of a visible detector's prediction sets."""
    from evaluation.models import Evaluation

    evaluation = Evaluation.objects.select_related("split", "predictions").get(pk=evaluation_id)
    visible = PredictionSet.objects.filter(
        predictions_id=evaluation.predictions_id,
        split_id=evaluation.split_id,
        version__detector__in=visible_detectors(user),
    ).exists()
    if not visible:
        raise Evaluation.DoesNotExist
    return evaluation


def can_load_splits(user):
    """Splits are shared benchmarks: engineers and leads of any team may load them."""
    return user.is_superuser or Membership.objects.filter(user=user, role__in=UPLOAD_ROLES).exists()


# Page data ------------------------------------------------------------------------

METRICS = {  # metric key -> (ClassScore field, summary keys tried for the mean)
    "AP": ("ap", ("AP",)),
    "AP50": ("ap50", ("AP50",)),
    "AP75": ("ap75", ("AP75",)),
    "recall": ("recall", ("AR100", "recall")),
    "miss_rate": ("miss_rate", ()),
}


def _scorecards(prediction_sets, protocols, *, with_result=False):
    """Finished scorecards of these prediction sets: {(set id, protocol): Scorecard}.

    The full engine result (curves, slices) is large; it is loaded only when asked.
    """
    from evaluation.models import Scorecard

    by_input = {(ps.predictions_id, ps.split_id): ps for ps in prediction_sets}
    cards = Scorecard.objects.filter(
        evaluation__state="done",
        evaluation__protocol__in=protocols,
        evaluation__predictions_id__in={k[0] for k in by_input},
        evaluation__split_id__in={k[1] for k in by_input},
    ).select_related("evaluation")
    if not with_result:
        cards = cards.defer("result")
    out = {}
    for card in cards:
        ps = by_input.get((card.evaluation.predictions_id, card.evaluation.split_id))
        if ps is not None:
            out[(ps.pk, card.protocol)] = card
    return out


def _class_rows(cards):
    from evaluation.models import ClassScore

    rows = {}
    for row in ClassScore.objects.filter(scorecard__in=list(cards)):
        rows.setdefault(row.scorecard_id, {})[row.class_name] = row
    return rows


def history_chart(detector):
    """Every version's numbers on every split, for the history chart and table.

    ``values[split][metric][class]`` is a list aligned with ``versions`` (None where
    not scored); class ``"mean"`` is the protocol's mean. A few queries, numbers as
    tuples.
    """
    from evaluation.models import ClassScore

    versions = list(detector.versions.select_related("sign_off").order_by("created_at"))
    baseline = baseline_of(detector)
    blocked = blocked_versions(versions)
    sets = list(
        PredictionSet.objects.current()
        .filter(version__detector=detector)
        .values_list("version_id", "split_id", "predictions_id")
    )
    version_of = {(file_id, split_id): version_id for version_id, split_id, file_id in sets}
    split_objects = {s.pk: s for s in _splits({split_id for _, split_id, _ in sets})}
    splits = sorted(split_objects.values(), key=lambda s: (s.name, s.revision))
    position = {v.pk: i for i, v in enumerate(versions)}
    classes = ["mean", *detector.classes]
    fields = [field for field, _ in METRICS.values()]
    scores = ClassScore.objects.filter(
        scorecard__evaluation__state="done",
        scorecard__evaluation__protocol=detector.primary_protocol,
        scorecard__evaluation__predictions_id__in={file_id for _, _, file_id in sets},
    ).values_list(
        "scorecard__evaluation__predictions_id",
        "scorecard__evaluation__split_id",
        "class_name",
        *fields,
    )
    # One array (split, metric, class, version) filled in a single vectorised step:
    # the Python loop would round 45,000 numbers one by one for 200 versions x 5 splits.
    split_index = {split.pk: k for k, split in enumerate(splits)}
    class_index = {name: k for k, name in enumerate(classes)}
    where, numbers = [], []
    for file_id, split_id, name, *row in scores:
        version_id = version_of.get((file_id, split_id))
        k = class_index.get(name or "mean")
        if version_id is not None and k is not None:
            where.append((split_index[split_id], k, position[version_id]))
            numbers.append(row)
    cube = np.full((len(splits), len(METRICS), len(classes), len(versions)), np.nan)
    if where:
        s_, c_, v_ = np.array(where).T
        # None (not measured) becomes NaN here and None again below.
        cube[s_, :, c_, v_] = np.array(numbers, dtype=float)
    # Four decimals: the page shows three, and shorter JSON renders faster. np.round
    # scales by 10^4 and can differ from Python's correctly rounded round() at halfway
    # cases; those few are rounded by round(), so the numbers equal the scorecard's.
    rounded = np.round(cube, 4)
    scaled = cube * 1e4
    for at in zip(*np.nonzero(np.abs(scaled - np.floor(scaled) - 0.5) < 1e-6)):
        rounded[at] = round(float(cube[at]), 4)
    shown = rounded.astype(object)
    shown[np.isnan(cube)] = None
    values = {
        split.pk: {
            metric: dict(zip(classes, shown[k, m].tolist())) for m, metric in enumerate(METRICS)
        }
        for k, split in enumerate(splits)
    }
    return {
        "protocol": detector.primary_protocol,
        "versions": [
            {
                "id": v.pk,
                "label": v.label,
                "date": v.created_at.date().isoformat(),
                "state": state_of(v, baseline, blocked),
            }
            for v in versions
        ],
        "splits": [{"id": s.pk, "name": str(s)} for s in splits],
        "metrics": list(METRICS),
        "classes": classes,
        "values": {str(k): v for k, v in values.items()},
    }


def _splits(ids):
    from evaluation.models import BenchmarkSplit

    return BenchmarkSplit.objects.filter(pk__in=ids).only("name", "revision")


def summary_items(summary):
    """A scorecard's summary in the engine's order (JSON columns may reorder keys)."""
    from evaluation.engine import COCO_SUMMARY_KEYS

    order = [*COCO_SUMMARY_KEYS, "recall"]  # other protocols use a subset of these
    rank = {key: i for i, key in enumerate(order)}
    return sorted(summary.items(), key=lambda item: (rank.get(item[0], len(order)), item[0]))


def version_scorecards(version):
    """Per split: the primary scorecard with its class and slice rows, and the
    headline of every other protocol. A fixed number of queries."""
    from evaluation.models import SliceScore

    detector = version.detector
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
                "classes": [rows.get(card.pk, {}).get(c) for c in detector.classes] if card else [],
                "tags": sorted(slices.get(card.pk, {}).items()) if card else [],
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
                    if p != detector.primary_protocol and (ps.pk, p) in cards
                ],
            }
        )
    return out


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


def _stored_intervals(reference, candidate, pairs, protocol):
    """{split id: (state, {tag or "": {class: [low, high, confidence]}}, error)} of the
    intervals computed on request for exactly these inputs (``releases.comparisons``)."""
    from django.conf import settings as django_settings
    from django.db.models import Q

    from .comparisons import CONFIDENCE
    from .models import ComparisonInterval

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
        )
        for row in rows
    }


def compare_versions(reference, candidate):
    """Per shared split: per-class AP deltas (candidate - reference), worst first,
    tag-slice deltas, both versions' precision-recall curves, and the intervals that
    decide whether a delta is marked: from the candidate's judgement against this
    reference, else computed on request (``interval_state``: None, queued, done or
    failed; ``missing_intervals`` when a delta has none and none is being computed)."""
    from evaluation.models import SliceScore

    from .models import Outcome

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
            version=candidate, baseline=reference, low__isnull=False, rule__tag__isnull=True
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
    tag_ap = {}
    for s in SliceScore.objects.filter(scorecard__in=used, kind="tag"):
        tag_ap[(s.scorecard_id, s.name, s.class_name or "mean")] = s.ap
    out = []
    for split in sorted(by_version, key=lambda s: (s.name, s.revision)):
        pair = by_version[split]
        if reference.pk not in pair or candidate.pk not in pair:
            continue
        a, b = pair[reference.pk], pair[candidate.pk]
        state, computed, error = stored.get(split.pk, (None, {}, ""))
        computed = computed if state == "done" else {}
        whole = computed.get("", {})
        deltas = []
        for name in ["mean", *detector.classes]:
            if name == "mean":
                va, vb = a.summary.get("AP"), b.summary.get("AP")
            else:
                ra, rb = rows.get(a.pk, {}).get(name), rows.get(b.pk, {}).get(name)
                va, vb = (ra.ap if ra else None), (rb.ap if rb else None)
            interval = whole.get(name) or judged.get((split.pk, name))
            deltas.append(_delta(name, va, vb, interval))
        deltas.sort(key=lambda d: (d["class"] != "mean", d["delta"] is None, d["delta"] or 0))
        tags = sorted({k[1] for k in tag_ap if k[0] in (a.pk, b.pk)})
        tag_rows = [
            {
                "tag": tag,
                "cells": [
                    _delta(
                        name,
                        tag_ap.get((a.pk, tag, name)),
                        tag_ap.get((b.pk, tag, name)),
                        computed.get(tag, {}).get(name),
                    )
                    for name in ["mean", *detector.classes]
                ],
            }
            for tag in tags
        ]
        curves = {
            name: {
                "reference": a.result["per_class"][name]["curve"],
                "candidate": b.result["per_class"][name]["curve"],
            }
            for name in detector.classes
            if name in a.result["per_class"] and name in b.result["per_class"]
        }
        out.append(
            {
                "split": split,
                "deltas": deltas,
                "tags": tag_rows,
                "curves": curves,
                "interval_state": state,
                "missing_intervals": state != "done"
                and any(d["delta"] is not None and not d["interval"] for d in deltas),
                "interval_error": error if state == "failed" else "",
            }
        )
    return out


def overview_for(user):
    """For each visible detector: its newest version, headline AP per split, and
    evaluations still queued or running (with progress)."""
    from evaluation.models import Evaluation

    from .models import ModelVersion

    detectors = list(visible_detectors(user).order_by("team__name", "name"))
    newest = {d.pk: None for d in detectors}
    baseline = {d.pk: None for d in detectors}
    versions = ModelVersion.objects.filter(detector__in=detectors).select_related("sign_off")
    for version in versions.order_by("created_at"):
        newest[version.detector_id] = version
    for version in ModelVersion.objects.filter(
        detector__in=detectors, sign_off__decision="approved"
    ).order_by("sign_off__decided_at"):
        baseline[version.detector_id] = version
    shown = [v for v in [*newest.values(), *baseline.values()] if v]
    blocked = blocked_versions(shown)
    sets = list(
        PredictionSet.objects.current().filter(version__in=shown).select_related("split", "version")
    )

    protocols = {d.primary_protocol for d in detectors}
    cards = _scorecards(sets, protocols)
    all_sets = PredictionSet.objects.current().filter(version__detector__in=detectors)
    pending = Evaluation.objects.filter(
        state__in=["queued", "running"],
        predictions_id__in=all_sets.values("predictions_id"),
    ).select_related("split")
    pending_by_file = {}
    for evaluation in pending:
        pending_by_file.setdefault(evaluation.predictions_id, []).append(evaluation)
    owner = dict(all_sets.values_list("predictions_id", "version__detector_id"))
    ap = {}
    for (set_id, _), card in cards.items():
        ap[set_id] = card.summary.get("AP")
    out = []
    for detector in detectors:
        version, base = newest[detector.pk], baseline[detector.pk]
        by_split = {}
        for ps in sets:
            if ps.version_id in {getattr(version, "pk", None), getattr(base, "pk", None)}:
                row = by_split.setdefault(
                    ps.split, {"split": ps.split, "candidate": None, "baseline": None}
                )
                if version and ps.version_id == version.pk:
                    row["candidate"] = ap.get(ps.pk)
                if base and ps.version_id == base.pk:
                    row["baseline"] = ap.get(ps.pk)
        headline = [by_split[k] for k in sorted(by_split, key=lambda s: (s.name, s.revision))]
        running = [
            e
            for file_id, evs in pending_by_file.items()
            if owner.get(file_id) == detector.pk
            for e in evs
        ]
        out.append(
            {
                "detector": detector,
                "newest": version,
                "baseline": base,
                "newest_state": state_of(version, base, blocked) if version else None,
                "headline": headline,
                "pending": running,
            }
        )
    return out


def split_usage(user, split):
    """Versions of visible detectors that were scored on ``split``."""
    return list(
        PredictionSet.objects.current()
        .filter(split=split, version__detector__in=visible_detectors(user))
        .select_related("version__detector")
        .order_by("version__detector__name", "version__created_at")
    )


def baseline_of(detector):
    """The detector's baseline: its most recently approved version, or None."""
    from .models import ModelVersion

    return (
        ModelVersion.objects.filter(detector=detector, sign_off__decision="approved")
        .order_by("-sign_off__decided_at")
        .first()
    )


def blocked_versions(versions):
    """Ids of the undecided versions among these that fail a release rule."""
    from .models import Outcome

    return set(
        Outcome.objects.filter(
            version__in=versions, status=Outcome.Status.FAIL, version__sign_off=None
        ).values_list("version_id", flat=True)
    )


def state_of(version, baseline, blocked=()):
    """The badge of a version: baseline, signed off, rejected, blocked or candidate."""
    decision = getattr(getattr(version, "sign_off", None), "decision", None)
    if baseline is not None and version.pk == baseline.pk:
        return "baseline"
    if decision == "approved":
        return "signed off"
    if decision == "rejected":
        return "rejected"
    return "blocked" if version.pk in blocked else "candidate"


def outcomes_of(version):
    """The version's judged rules, failures first."""
    from .models import Outcome

    order = {"fail": 0, "not significant": 1, "no data": 2, "pass": 3}
    rows = list(
        Outcome.objects.filter(version=version).select_related("split", "criteria", "baseline")
    )
    return sorted(
        rows, key=lambda o: (order.get(o.status, 9), o.rule_index, o.split.name, o.class_name)
    )


def class_numbers(row):
    """One ClassScore row as the API and the evidence report give it."""
    return {
        "class": row.class_name,
        "AP": row.ap,
        "AP50": row.ap50,
        "AP75": row.ap75,
        "recall": row.recall,
        "gt": row.gt,
        "tp": row.tp,
        "fp": row.fp,
        "best_f1": row.best_f1,
        "best_f1_threshold": row.best_f1_threshold,
        "miss_rate": row.miss_rate,
    }


def evidence_for(version):
    """Everything a reviewer needs about one version, JSON-serialisable."""
    from django.conf import settings as django_settings

    from evaluation.engine import ENGINE_VERSION

    from .audit import verify_audit
    from .models import AuditEvent

    detector = version.detector
    outcomes = outcomes_of(version)
    intervals = {
        (o.split_id, o.class_name): (o.low, o.high)
        for o in outcomes
        if o.rule.get("kind") == "no_significant_drop" and o.low is not None
    }
    splits = []
    for entry in version_scorecards(version):
        card = entry["card"]
        if card is None:
            splits.append({"split": str(entry["split"]), "scored": False})
            continue
        classes = []
        for row in entry["classes"]:
            if row is None:
                continue
            low, high = intervals.get((entry["split"].pk, row.class_name), (None, None))
            classes.append({**class_numbers(row), "delta_AP_interval": [low, high]})
        splits.append(
            {
                "split": str(entry["split"]),
                "scored": True,
                "protocol": card.protocol,
                "protocol_version": card.protocol_version,
                "engine_version": card.engine_version,
                "split_sha256": card.split_sha256,
                "predictions_sha256": card.predictions_sha256,
                "summary": dict(summary_items(card.summary)),
                "classes": classes,
            }
        )
    decision = getattr(version, "sign_off", None)
    broken, head, count = verify_audit()
    events = AuditEvent.objects.filter(subject=f"version:{version.pk}").order_by("id")
    return {
        "caution": CAUTION,
        "detector": detector.name,
        "team": detector.team.name,
        "version": version.label,
        "source_commit": version.source_commit,
        "registered": version.created_at.isoformat(),
        "engine_version": ENGINE_VERSION,
        "bootstrap": {
            "resamples": django_settings.BENCHBOOK_BOOTSTRAP_RESAMPLES,
            "seed": django_settings.BENCHBOOK_BOOTSTRAP_SEED,
        },
        "splits": splits,
        "outcomes": [
            {
                "rule": o.rule_index + 1,
                "criteria_version": o.criteria.number,
                "kind": o.rule.get("kind"),
                "split": str(o.split),
                "class": o.class_name,
                "status": o.status,
                "value": o.value,
                "baseline": o.baseline.label if o.baseline else None,
                "baseline_value": o.baseline_value,
                "interval": [o.low, o.high],
                "detail": o.detail,
            }
            for o in outcomes
        ],
        "sign_off": None
        if decision is None
        else {
            "decision": decision.decision,
            "by": decision.decided_by.get_username(),
            "at": decision.decided_at.isoformat(),
            "comment": decision.comment,
            "override": decision.override,
            "justification": decision.justification,
            "failing_rules": decision.failing_rules,
        },
        "audit": {
            "chain_intact": broken is None,
            "first_broken_event": broken,
            "head": head,
            "events": count,
            "decision_events": [e.hash for e in events],
        },
    }


def baselines_of(detectors):
    """{detector id: its baseline version (id and detector id only)}, in one query:
    for each detector the approved version decided last, as ``baseline_of``."""
    from .models import ModelVersion

    approved = ModelVersion.objects.filter(
        detector__in=detectors, sign_off__decision="approved"
    ).order_by("sign_off__decided_at")
    return {v.detector_id: v for v in approved.only("id", "detector_id")}


def version_states(versions):
    """{version id: badge} for many versions of any detectors, in three queries."""
    versions = list(versions)
    baselines = baselines_of({v.detector_id for v in versions})
    blocked = blocked_versions(versions)
    return {v.pk: state_of(v, baselines.get(v.detector_id), blocked) for v in versions}


def verdict_of(version):
    """What a pipeline waits for: whether scoring and judging are over, and the result.

    ``pending`` until every evaluation has finished and the criteria were applied
    after the last of them; then ``evaluation failed``, ``regression`` (a rule fails),
    ``no criteria`` or ``no regression``.
    """
    from .models import Outcome

    evaluations = evaluations_of(version)
    outcomes = list(Outcome.objects.filter(version=version).values_list("status", flat=True))
    counts = {status: outcomes.count(status) for status in Outcome.Status.values}
    done = [e.finished_at for e in evaluations if e.finished and e.finished_at]
    if not evaluations:
        verdict = "no predictions"
    elif len(done) < len(evaluations) or version.judged_at is None or version.judged_at < max(done):
        verdict = "pending"
    elif any(e.state == "failed" for e in evaluations):
        verdict = "evaluation failed"
    elif counts["fail"]:
        verdict = "regression"
    elif not outcomes and version.detector.criteria.count() == 0:
        verdict = "no criteria"
    else:
        verdict = "no regression"
    return {"verdict": verdict, "evaluations": evaluations, "outcome_counts": counts}


def visible_audit_events(user):
    """Reviewers (anywhere) read the whole trail; members read the events about their
    teams' detectors, versions, prediction sets and evaluations, and split events."""
    from django.db.models import CharField, Q, Value
    from django.db.models.functions import Cast, Concat

    from .models import AuditEvent, ModelVersion

    events = AuditEvent.objects.all()
    if not user.is_authenticated:
        return events.none()
    if reads_all_teams(user):
        return events

    def subjects(queryset, prefix):
        return queryset.annotate(
            subject_key=Concat(Value(prefix), Cast("pk", CharField()), output_field=CharField())
        ).values("subject_key")

    detectors = visible_detectors(user)
    sets = PredictionSet.objects.filter(version__detector__in=detectors)
    return events.filter(
        Q(subject__startswith="split:")
        | Q(subject__in=subjects(Detector.objects.filter(pk__in=detectors), "detector:"))
        | Q(subject__in=subjects(ModelVersion.objects.filter(detector__in=detectors), "version:"))
        | Q(subject__in=subjects(sets, "prediction-set:"))
        | Q(subject__in=subjects(visible_evaluations(user), "evaluation:"))
    )


def visible_evaluations(user):
    """Evaluations of the prediction sets of visible detectors."""
    from django.db.models import Exists, OuterRef

    from evaluation.models import Evaluation

    sets = PredictionSet.objects.filter(version__detector__in=visible_detectors(user))
    return Evaluation.objects.filter(
        Exists(
            sets.filter(predictions_id=OuterRef("predictions_id"), split_id=OuterRef("split_id"))
        )
    )
