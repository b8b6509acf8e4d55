"""THE verdict of a candidate, and the judging that records it.

States: ``scoring`` (an evaluation of a current prediction set, under a suite protocol,
is queued, running or not yet requested) → ``judging`` (all finished; no judgement
recorded against the current criteria, suite, baseline and evaluations) → one final
state, from that judgement: ``incomplete`` (a required split has no scored predictions,
an evaluation failed, or judging itself failed), ``regression`` (a rule fails) or
``pass``. ``no_criteria`` says the detector had no criteria when judged.

A decided version keeps the verdict its decision was made on. Pages, API, client,
evidence and sign-off all read ``verdict_of``; ``judge`` is the only writer of
judgements, and it takes the version's row lock, as ``services.sign_off`` does.
"""

import logging
from dataclasses import dataclass, field

from django.db import transaction
from django.utils import timezone

from . import audit, suites
from .models import AuditEvent, Judgement, ModelVersion, Outcome, PredictionSet, SignOff

log = logging.getLogger(__name__)

STATES = ("scoring", "judging", "incomplete", "regression", "pass")
FINAL = ("incomplete", "regression", "pass")
OPEN = ("queued", "running")


@dataclass
class Verdict:
    state: str
    no_criteria: bool = False
    reasons: list = field(default_factory=list)
    judgement: Judgement | None = None
    evaluations: list = field(default_factory=list)
    missing: list = field(default_factory=list)
    decided: bool = False

    @property
    def final(self):
        return self.state in FINAL


def current_sets(version):
    """The version's current prediction sets (one per split), with their splits."""
    sets = PredictionSet.objects.current().filter(version=version)
    return list(sets.select_related("split", "predictions"))


def baseline_for(version):
    """The detector's baseline for judging ``version``: its most recently approved
    version other than ``version`` itself, or None."""
    return (
        ModelVersion.objects.filter(detector_id=version.detector_id, sign_off__decision="approved")
        .exclude(pk=version.pk)
        .order_by("-sign_off__decided_at", "-sign_off__id")
        .first()
    )


@dataclass
class Inputs:
    """Everything a judgement depends on; ``key`` compares two readings."""

    criteria: object
    suite: object
    baseline: object
    sets: list
    evaluations: list
    required: list
    unrequested: list  # (prediction set, protocol) with no evaluation yet

    @property
    def key(self):
        return (
            getattr(self.criteria, "pk", None),
            getattr(self.suite, "pk", None),
            getattr(self.baseline, "pk", None),
            evaluation_states(self.evaluations),
            [s.pk for s in self.required],
        )

    @property
    def scoring(self):
        return bool(self.unrequested) or any(e.state in OPEN for e in self.evaluations)

    def missing(self):
        scored = {e.split_id for e in self.evaluations}
        have = {ps.split_id for ps in self.sets}
        return [s for s in self.required if s.pk not in have or s.pk not in scored]


def evaluation_states(evaluations):
    return {str(e.pk): e.state for e in sorted(evaluations, key=lambda e: e.pk)}


def inputs_of(version):
    from evaluation.models import Evaluation

    from .criteria import current_criteria

    detector = version.detector
    suite = suites.current_suite(detector)
    protocols = suite.protocols if suite else [detector.primary_protocol]
    sets = current_sets(version)
    pairs = {(ps.predictions_id, ps.split_id): ps for ps in sets}
    found = Evaluation.objects.filter(
        predictions_id__in={p for p, _ in pairs},
        split_id__in={s for _, s in pairs},
        protocol__in=protocols,
    ).select_related("split", "predictions")
    if suite is not None:
        found = found.filter(box_policy=suite.box_policy)
    evaluations = [e for e in found if (e.predictions_id, e.split_id) in pairs]
    have = {(e.predictions_id, e.split_id, e.protocol) for e in evaluations}
    unrequested = [
        (ps, p) for ps in sets for p in protocols if (ps.predictions_id, ps.split_id, p) not in have
    ]
    evaluations.sort(key=lambda e: (e.split.name, e.split.revision, protocols.index(e.protocol)))
    return Inputs(
        criteria=current_criteria(detector),
        suite=suite,
        baseline=baseline_for(version),
        sets=sets,
        evaluations=evaluations,
        required=suites.resolve(suite.splits) if suite else [],
        unrequested=unrequested,
    )


def newest_judgement(version):
    return Judgement.objects.filter(version=version).order_by("-id").first()


def _matches(judgement, inputs):
    return (
        judgement is not None
        and (
            judgement.criteria_id,
            judgement.suite_id,
            judgement.baseline_id,
            judgement.evaluations,
            judgement.required_splits,
        )
        == inputs.key
    )


def _pending_reasons(inputs):
    reasons = [] if inputs.sets else ["no predictions uploaded"]
    reasons += [f"no predictions on {s}" for s in inputs.missing()]
    failed = [e for e in inputs.evaluations if e.state == "failed"]
    reasons += [f"{e.protocol} on {e.split} failed: {e.error}" for e in failed]
    return reasons


def verdict_of(version):
    """The candidate's verdict (see the module docstring)."""
    decision = SignOff.objects.filter(version=version).select_related("judgement").first()
    if decision is not None:
        return _decided(version, decision)
    inputs = inputs_of(version)
    missing = [str(s) for s in inputs.missing()]
    if inputs.scoring:
        return Verdict("scoring", evaluations=inputs.evaluations, missing=missing)
    if not inputs.sets:  # nothing to judge: incomplete without a judgement
        return Verdict(
            "incomplete",
            no_criteria=inputs.criteria is None,
            reasons=_pending_reasons(inputs),
            missing=missing,
        )
    judgement = newest_judgement(version)
    if not _matches(judgement, inputs):
        return Verdict(
            "judging",
            no_criteria=inputs.criteria is None,
            reasons=_pending_reasons(inputs),
            judgement=None,
            evaluations=inputs.evaluations,
            missing=missing,
        )
    return Verdict(
        judgement.verdict,
        no_criteria=judgement.criteria_id is None,
        reasons=list(judgement.reasons),
        judgement=judgement,
        evaluations=inputs.evaluations,
        missing=missing,
    )


def _decided(version, decision):
    """A decided version keeps what the decision saw (older decisions: their rules)."""
    inputs = inputs_of(version)
    judgement = decision.judgement
    if judgement is not None:
        state, reasons = judgement.verdict, list(judgement.reasons)
        no_criteria = judgement.criteria_id is None
    else:  # decided before judgements were recorded
        reasons = [f.get("detail") or str(f.get("rule")) for f in decision.failing_rules]
        state = "regression" if decision.failing_rules else "pass"
        no_criteria = False
    return Verdict(
        state,
        no_criteria=no_criteria,
        reasons=reasons,
        judgement=judgement,
        evaluations=inputs.evaluations,
        missing=[str(s) for s in inputs.missing()],
        decided=True,
    )


# Judging -----------------------------------------------------------------------------


def judge(version_id, *, attempts=3):
    """Judge an undecided version once it is scored; record a Judgement (with its
    outcomes and an audit event) unless the current one already matches.

    Computing (bootstrap intervals) happens outside any lock; the record is written
    under the version's row lock after re-reading the inputs, so a judgement never
    describes inputs that changed meanwhile (then it computes again). Returns the new
    Judgement or None. An exception while computing is recorded as an *incomplete*
    judgement naming the error, so no version waits in ``judging`` for ever.
    """
    for _ in range(attempts):
        version = ModelVersion.objects.select_related("detector").filter(pk=version_id).first()
        if version is None or SignOff.objects.filter(version=version).exists():
            return None
        inputs = inputs_of(version)
        if inputs.scoring or not inputs.sets:
            _request_missing(inputs, version)
            return None
        if _matches(newest_judgement(version), inputs):
            return None
        try:
            verdict, reasons, outcomes = _compute(version, inputs)
        except Exception as e:  # noqa: BLE001 - recorded, not lost
            log.exception("judging %s failed", version)
            verdict, reasons, outcomes = "incomplete", [f"judging failed: {e}"], []
        with transaction.atomic():
            locked = ModelVersion.objects.select_for_update().get(pk=version_id)
            if SignOff.objects.filter(version_id=version_id).exists():
                return None
            again = inputs_of(locked)
            if again.key != inputs.key or again.scoring:
                continue
            return _record(locked, inputs, verdict, reasons, outcomes)
    log.warning("inputs of version %s kept changing; the sweep will judge it", version_id)
    return None


def _request_missing(inputs, version):
    """Evaluations a suite change asked for (a new protocol): request them."""
    from .services import request_for_set

    if not inputs.unrequested:
        return
    with transaction.atomic():
        for prediction_set, protocol in inputs.unrequested:
            request_for_set(prediction_set, [protocol])


def _compute(version, inputs):
    from .criteria import outcomes_for

    reasons = _pending_reasons(inputs)
    outcomes = outcomes_for(version, inputs) if inputs.criteria is not None else []
    if reasons:
        verdict = "incomplete"
    elif any(o.status == Outcome.Status.FAIL for o in outcomes):
        verdict = "regression"
        reasons = [o.detail for o in outcomes if o.status == Outcome.Status.FAIL]
    else:
        verdict = "pass"
    return verdict, reasons, outcomes


def _record(version, inputs, verdict, reasons, outcomes):
    now = timezone.now()
    judgement = Judgement.objects.create(
        version=version,
        criteria=inputs.criteria,
        suite=inputs.suite,
        baseline=inputs.baseline,
        evaluations=evaluation_states(inputs.evaluations),
        required_splits=[s.pk for s in inputs.required],
        verdict=verdict,
        reasons=reasons,
        judged_at=now,
    )
    for outcome in outcomes:
        outcome.judgement = judgement
    Outcome.objects.bulk_create(outcomes)
    counts = {}
    for outcome in outcomes:
        counts[outcome.status] = counts.get(outcome.status, 0) + 1
    audit.record_event(
        AuditEvent.Kind.JUDGED,
        "system",
        f"version:{version.pk}",
        {
            "version": str(version),
            "judgement": judgement.pk,
            "verdict": verdict,
            "reasons": reasons,
            "criteria": inputs.criteria.number if inputs.criteria else None,
            "suite": inputs.suite.number if inputs.suite else None,
            "baseline": inputs.baseline.label if inputs.baseline else None,
            "evaluations": judgement.evaluations,
            "outcomes": counts,
        },
    )
    ModelVersion.objects.filter(pk=version.pk).update(judged_at=now)
    transaction.on_commit(lambda: _notify(version.pk))
    return judgement


def _notify(version_id):
    """Queue the notification task: a slow e-mail server or webhook never holds judging
    (nor the worker behind it); a broker that is down loses only the message."""
    from .tasks import queue_notification

    queue_notification(version_id)
