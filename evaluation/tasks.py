"""Celery tasks: thin callers of ``services``; they take ids and are idempotent.

Retries live in ``evaluation.jobs`` (database outages, over a time window) and in the
beat sweep (lost messages, dead workers), not in Celery's retry counter.
"""

from celery import shared_task

from . import class_groups, loo_fill, scoring, services, sharding


@shared_task(bind=True, acks_late=True)
def score(self, evaluation_id):
    """Score one evaluation (a finished one is a no-op)."""
    scoring.run_evaluation(evaluation_id, claim=self.request.id)


@shared_task(acks_late=True, ignore_result=False)
def score_shard(evaluation_id, claim, index):
    """Match one image shard of a large evaluation (a chord's header; its result, None,
    is stored so the chord can count it)."""
    sharding.run_shard(evaluation_id, claim, index)


@shared_task(acks_late=True)
def merge_shards(evaluation_id, claim):
    """The shards' chord callback: send the class groups (``class_groups.dispatch``)."""
    sharding.run_merge(evaluation_id, claim)


@shared_task(acks_late=True, ignore_result=False)
def score_class_group(evaluation_id, claim, index):
    """Merge and score one group of classes from every shard (a chord's header)."""
    class_groups.run_group(evaluation_id, claim, index)


@shared_task(acks_late=True)
def finish_class_groups(evaluation_id, claim):
    """The groups' chord callback: assemble, write the records file, store."""
    class_groups.run_finish(evaluation_id, claim)


@shared_task(acks_late=True)
def fill_leave_one_out(scorecard_id):
    """Store one scorecard's per-image leave-one-out file if it has none
    (``loo_fill.fill``: idempotent; a changed records file is refused and audited)."""
    return loo_fill.fill(scorecard_id).status


@shared_task
def sweep():
    """Requeue evaluations the broker lost or a dead worker left running."""
    return services.requeue_stalled()
