"""Celery tasks of releases: thin, idempotent, ids only."""

from celery import shared_task

from . import criteria, notify
from .models import ModelVersion


@shared_task(acks_late=True)
def judge(version_id):
    """(Re)judge a version against its detector's criteria; outcomes are replaced."""
    version = ModelVersion.objects.select_related("detector").filter(pk=version_id).first()
    if version is not None and criteria.judge(version):
        notify.notify(version)


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
