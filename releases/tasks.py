"""Celery tasks of releases: thin, idempotent, ids only."""

import logging

from celery import shared_task
from django.conf import settings

from . import notify as notifications

log = logging.getLogger(__name__)


@shared_task(bind=True, acks_late=True, max_retries=settings.BENCHBOOK_JUDGE_RETRIES)
def judge(self, version_id):
    """Judge a version if its judgement is not current (see releases.judging). An error
    while judging is retried with back-off (the version reads ``judging`` meanwhile);
    the last retry records it as an incomplete judgement naming the cause. A retry the
    broker cannot take is left to the sweep (``judging_queue.requeue_unjudged``)."""
    from . import judging

    retries = self.request.retries or 0
    try:
        judgement = judging.judge(
            version_id, final=retries >= self.max_retries, attempt=retries + 1
        )
    except judging.JudgingFailed as e:
        delay = settings.BENCHBOOK_JUDGE_RETRY_SECONDS * 2**retries
        raise self.retry(exc=e, countdown=delay) from None
    return judgement.pk if judgement else None


@shared_task(acks_late=True)
def rejudge(detector_id):
    """Judge every undecided version of a detector again (criteria, suite or baseline
    changed); each one in its own task, so one slow bootstrap does not hold the rest."""
    from . import judging_queue

    version_ids = list(judging_queue.undecided(detector_id).values_list("pk", flat=True))
    for version_id in version_ids:
        judging_queue._send(judge, version_id)
    return version_ids


def queue_notification(notification_id, countdown=0):
    try:
        notify.apply_async(args=[notification_id], countdown=countdown)
    except Exception:  # broker down: the notification stays pending; the sweep resends it
        log.exception("could not queue notification %s", notification_id)


@shared_task(
    acks_late=True,
    soft_time_limit=4 * settings.BENCHBOOK_WEBHOOK_TIMEOUT_SECONDS + 10,
    time_limit=4 * settings.BENCHBOOK_WEBHOOK_TIMEOUT_SECONDS + 20,
)
def notify(notification_id):
    """One attempt at a recorded notification (``notify.deliver``); the next attempt
    is a new message with a countdown, not a sleep, and the sweep backs it up."""
    result = notifications.deliver(notification_id)
    if result and result["retry_in"] is not None:
        queue_notification(notification_id, result["retry_in"])
    return result


@shared_task
def resend_notifications():
    """Beat: queue again every pending notification whose attempt is due."""
    due = notifications.resend_due()
    for notification_id in due:
        queue_notification(notification_id)
    return due


@shared_task
def sweep():
    """Judge again the versions whose judging was lost (see judging_queue.requeue_unjudged)."""
    from . import judging_queue

    return judging_queue.requeue_unjudged()


@shared_task(acks_late=True)
def compare(interval_id):
    """Compute one requested ΔAP interval (see releases.comparisons)."""
    from . import comparisons

    comparisons.compute(interval_id)


@shared_task
def verify_audit():
    """The full audit verification on a schedule (beat), kept for the audit page."""
    from .audit_check import verify_and_record

    report, verification = verify_and_record("schedule")
    if not report.ok:
        log.error("audit verification: %d finding(s)", len(report.problems))
    return verification.pk
