"""When judging is queued: once a version is scored, again when what it is judged against
changes, and by the sweep for judging that was lost. ``judging.judge`` does the judging;
these only send its task (after the commit), never record anything."""

import logging

from django.db import transaction
from django.utils import timezone

from .models import ModelVersion, PredictionSet

log = logging.getLogger(__name__)


def judge_if_complete(version_id):
    """Queue judging (on commit) once none of the version's evaluations is pending (the
    judge re-reads everything, so queuing it once too often is harmless)."""
    from evaluation.models import Evaluation

    from .tasks import judge

    sets = PredictionSet.objects.current().filter(version_id=version_id)
    pending = Evaluation.objects.filter(
        predictions_id__in=sets.values("predictions_id"),
        split_id__in=sets.values("split_id"),
        state__in=["queued", "running"],
    ).exists()
    if not pending:
        transaction.on_commit(lambda: _send(judge, version_id))


def rejudge_later(detector_id):
    """Judge every undecided version of a detector again once the transaction commits
    (criteria, suite or baseline changed)."""
    from .tasks import rejudge

    transaction.on_commit(lambda: _send(rejudge, detector_id))


def undecided(detector_id):
    return ModelVersion.objects.filter(detector_id=detector_id, sign_off=None).order_by("pk")


def requeue_unjudged():
    """Queue judging again for undecided versions stuck in ``judging`` (or waiting for an
    evaluation a suite change asked for) since their last judgement or evaluation more
    than the grace period ago: the broker was down, or the judging worker died. Returns
    the version ids."""
    import datetime

    from django.conf import settings

    from . import verdicts
    from .tasks import judge

    cutoff = timezone.now() - datetime.timedelta(seconds=settings.BENCHBOOK_QUEUED_GRACE_SECONDS)
    versions = list(ModelVersion.objects.filter(sign_off=None))
    all_inputs = verdicts.inputs_for(versions)  # a fixed number of queries for all of them
    newest = verdicts.newest_judgements([v.pk for v in versions])
    version_ids = []
    for version in versions:
        inputs = all_inputs[version.pk]
        if any(e.state in verdicts.OPEN for e in inputs.evaluations):
            continue  # judged when scoring ends
        if not inputs.unrequested and verdicts._matches(newest.get(version.pk), inputs):
            continue
        times = [e.finished_at for e in inputs.evaluations if e.finished_at]
        times += [version.created_at, version.judged_at or version.created_at]
        times += [getattr(spec, "created_at", None) for spec in (inputs.criteria, inputs.suite)]
        if max(t for t in times if t is not None) < cutoff:
            version_ids.append(version.pk)
    for version_id in version_ids:
        _send(judge, version_id)
    return version_ids


def _send(task, *args):
    try:
        task.delay(*args)
    except Exception:  # broker down: judging can be re-run, it is idempotent
        log.exception("could not queue %s%s", task.name, args)
