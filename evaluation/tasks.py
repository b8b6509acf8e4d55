"""Celery tasks: thin callers of ``services``; they take ids and are idempotent."""

from celery import shared_task
from django.db import OperationalError

from . import services


@shared_task(
    bind=True,
    acks_late=True,
    autoretry_for=(OperationalError,),
    retry_backoff=True,
    retry_backoff_max=300,
    max_retries=5,
)
def score(self, evaluation_id):
    """Score one evaluation (a finished one is a no-op)."""
    services.run_evaluation(evaluation_id, claim=self.request.id)


@shared_task
def sweep():
    """Requeue evaluations the broker lost or a dead worker left running."""
    return services.requeue_stalled()
