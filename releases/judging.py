"""The judge: computes a scored candidate's verdict and records it as a Judgement.

``judge`` is the only writer of judgements. It reads its inputs as ``verdicts.inputs_of``
does (the one reading shared with pages, lists and the sweep), computes outside any lock,
then records under the version's row lock, as ``services.sign_off`` does.
"""

import logging

from django.db import transaction
from django.utils import timezone

from . import audit, notify
from .audit_check import judgement_payload
from .models import AuditEvent, Judgement, ModelVersion, Outcome, SignOff
from .verdicts import _matches, _pending_reasons, evaluation_states, inputs_of, newest_judgement

log = logging.getLogger(__name__)


class JudgingFailed(Exception):
    """Judging raised and this was not the last attempt: nothing was recorded, the
    version stays ``judging``; the caller retries (``tasks.judge``, with back-off)."""


def judge(version_id, *, attempts=3, final=True, attempt=1):
    """Judge an undecided version once it is scored; record a Judgement (with its
    outcomes and an audit event) unless the current one already matches.

    Computing (bootstrap intervals) happens outside any lock; the record is written
    under the version's row lock after re-reading the inputs, so a judgement never
    describes inputs that changed meanwhile (then it computes again). Returns the new
    Judgement or None. An exception while computing raises ``JudgingFailed`` (nothing
    recorded) unless ``final``: then it is recorded as an *incomplete* judgement naming
    the error and the number of attempts (``attempt``), so no version waits in
    ``judging`` for ever, and a transient error never leaves a final verdict while
    retries remain.
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
        except Exception as e:  # noqa: BLE001 - retried, then recorded, never lost
            cause = f"{type(e).__name__}: {e}"
            if not final:
                log.warning("judging %s failed (attempt %d), retried: %s", version, attempt, cause)
                raise JudgingFailed(cause) from e
            log.exception("judging %s failed (attempt %d), recorded", version, attempt)
            tries = f"after {attempt} attempts" if attempt > 1 else "once"
            verdict, reasons, outcomes = "incomplete", [f"judging failed {tries}: {cause}"], []
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
    from .rule_outcomes import outcomes_for

    reasons = _pending_reasons(inputs) + inputs.reserved
    outcomes = outcomes_for(version, inputs) if inputs.criteria is not None else []
    missing = [o.detail for o in outcomes if o.status == Outcome.Status.MISSING]
    if reasons:
        verdict = "incomplete"
    elif missing:  # a rule without its number (e.g. no level result) never passes
        verdict, reasons = "incomplete", sorted(set(missing))
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
        baseline_evaluations=evaluation_states(inputs.baseline_evaluations),
        verdict=verdict,
        reasons=reasons,
        judged_at=now,
    )
    for outcome in outcomes:
        outcome.judgement = judgement
    Outcome.objects.bulk_create(outcomes)
    audit.record_event(
        AuditEvent.Kind.JUDGED,
        "system",
        f"version:{version.pk}",
        {
            "version": str(version),
            "judgement": judgement.pk,
            "criteria": inputs.criteria.number if inputs.criteria else None,
            "suite": inputs.suite.number if inputs.suite else None,
            "baseline": inputs.baseline.label if inputs.baseline else None,
            **judgement_payload(judgement),  # re-derived from the rows by verify_audit
        },
    )
    ModelVersion.objects.filter(pk=version.pk).update(judged_at=now)
    notification = notify.record(version, judgement)
    transaction.on_commit(lambda: _notify(notification.pk))
    return judgement


def _notify(notification_id):
    """Queue the notification task: a slow e-mail server or webhook never holds judging
    (nor the worker behind it); a lost message is sent again by the sweep."""
    from .tasks import queue_notification

    queue_notification(notification_id)
