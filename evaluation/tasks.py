"""Celery tasks: thin callers of ``services``; they take ids and are idempotent.

Retries live in ``evaluation.jobs`` (database outages, over a time window) and in the
beat sweep (lost messages, dead workers), not in Celery's retry counter.
"""

from celery import shared_task

from . import scoring, services


@shared_task(bind=True, acks_late=True)
def score(self, evaluation_id):
    """Score one evaluation (a finished one is a no-op)."""
    scoring.run_evaluation(evaluation_id, claim=self.request.id)


@shared_task
def sweep():
    """Requeue evaluations the broker lost or a dead worker left running."""
    return services.requeue_stalled()
