"""Celery tasks of releases: thin, idempotent, ids only."""

from celery import shared_task


@shared_task(acks_late=True)
def judge(version_id):
    """Judge a version if its judgement is not current (see releases.verdicts)."""
    from . import verdicts

    judgement = verdicts.judge(version_id)
    return judgement.pk if judgement else None


@shared_task(acks_late=True)
def rejudge(detector_id):
    """Judge every undecided version of a detector again (criteria, suite or baseline
    changed); each one in its own task, so one slow bootstrap does not hold the rest."""
    from . import services

    version_ids = list(services.undecided(detector_id).values_list("pk", flat=True))
    for version_id in version_ids:
        services._send(judge, version_id)
    return version_ids


@shared_task
def sweep():
    """Judge again the versions whose judging was lost (see services.requeue_unjudged)."""
    from . import services

    return services.requeue_unjudged()


@shared_task(acks_late=True)
def compare(interval_id):
    """Compute one requested ΔAP interval (see releases.comparisons)."""
    from . import comparisons

    comparisons.compute(interval_id)
