"""Intervals of ΔAP for any two versions, computed in the background on request.

A judgement computes paired-bootstrap intervals only for the candidate against its
baseline and only for the classes its rules name. The compare page may show any pair;
where no interval exists, a reader asks for one: ``request_intervals`` queues one row
per shared scored split and ``compute`` (the task ``releases.tasks.compare``) fills it
with the same bootstrap the judge uses (``delta_intervals._intervals``: same replicates, same
seed), for the mean, every class, every image tag of the split and every size bucket
of the protocol.
"""

import logging
import math

from django.conf import settings
from django.db import IntegrityError, transaction
from django.utils import timezone

from evaluation.services import UploadError

from . import selectors
from .models import ComparisonInterval, PredictionSet

log = logging.getLogger(__name__)

CONFIDENCE = 0.95


def _inputs(reference, candidate):
    """{split: (reference set, candidate set)} of the splits both versions were scored on
    under the primary protocol."""
    protocol = reference.detector.primary_protocol
    sets = list(
        PredictionSet.objects.current()
        .filter(version__in=[reference, candidate])
        .select_related("split")
    )
    cards = selectors._scorecards(sets, [protocol])
    pairs = {}
    for ps in sets:
        if (ps.pk, protocol) in cards:
            side = 0 if ps.version_id == reference.pk else 1
            pairs.setdefault(ps.split, [None, None])[side] = ps
    return {split: tuple(pair) for split, pair in pairs.items() if None not in pair}


def key_of(reference_set, candidate_set, protocol, team_id):
    """The fields that identify one interval's inputs (team, files, split, protocol,
    bootstrap)."""
    return {
        "team_id": team_id,
        "reference_predictions_id": reference_set.predictions_id,
        "candidate_predictions_id": candidate_set.predictions_id,
        "split_id": candidate_set.split_id,
        "protocol": protocol,
        "confidence": CONFIDENCE,
        "resamples": settings.BENCHBOOK_BOOTSTRAP_RESAMPLES,
        "seed": settings.BENCHBOOK_BOOTSTRAP_SEED,
    }


def request_intervals(reference, candidate, user):
    """Queue the intervals of ``candidate − reference`` on every shared scored split
    that has none (a failed one is queued again). Any reader of the detector may ask:
    it records no decision. Returns the rows queued."""
    if reference.detector_id != candidate.detector_id:
        raise UploadError("the two versions belong to different detectors")
    if reference.pk == candidate.pk:
        raise UploadError("choose two different versions")
    selectors.version_for(user, candidate.pk)  # ModelVersion.DoesNotExist if not visible
    protocol = reference.detector.primary_protocol
    queued = []
    for ref_set, cand_set in _inputs(reference, candidate).values():
        key = key_of(ref_set, cand_set, protocol, candidate.detector.team_id)
        with transaction.atomic():
            row = ComparisonInterval.objects.select_for_update().filter(**key).first()
            if row is None:
                try:
                    with transaction.atomic():
                        row = ComparisonInterval.objects.create(
                            reference=reference, candidate=candidate, requested_by=user, **key
                        )
                except IntegrityError:  # another request queued it first
                    continue
            elif row.state == ComparisonInterval.State.FAILED:
                row.state, row.error = ComparisonInterval.State.QUEUED, ""
                row.save(update_fields=["state", "error"])
            else:
                continue
            queued.append(row)
            transaction.on_commit(lambda pk=row.pk: _dispatch(pk))
    return queued


def _dispatch(pk):
    from . import tasks

    try:
        tasks.compare.delay(pk)
    except Exception:  # broker down: the row stays queued, the button offers it again
        log.exception("could not queue comparison interval %s", pk)


def _clean(interval):
    return [None if math.isnan(v) else round(v, 6) for v in (interval.low, interval.high)]


def compute(pk):
    """Fill one queued row: intervals of the mean and each class, on the whole split and
    under each image tag. Idempotent: a row that is done is left alone."""
    from evaluation.models import Scorecard

    from .delta_intervals import _intervals

    row = ComparisonInterval.objects.select_related("split").filter(pk=pk).first()
    if row is None or row.state == ComparisonInterval.State.DONE:
        return row
    cards = {
        card.evaluation.predictions_id: card
        for card in Scorecard.objects.filter(
            evaluation__state="done",
            evaluation__protocol=row.protocol,
            evaluation__split_id=row.split_id,
            evaluation__predictions_id__in=[
                row.reference_predictions_id,
                row.candidate_predictions_id,
            ],
        ).select_related("evaluation__split")
    }
    try:
        reference = cards[row.reference_predictions_id]
        candidate = cards[row.candidate_predictions_id]
        intervals, sizes = {}, {}
        for tag in ["", *sorted(row.split.tags)]:
            found = _intervals(candidate, reference, tag or None, row.confidence)
            intervals[tag] = {name: _clean(i) for name, i in found.items()}
        for size in size_buckets(candidate):
            found = _intervals(candidate, reference, None, row.confidence, size=size)
            sizes[size] = {name: _clean(i) for name, i in found.items()}
    except Exception as e:  # a missing scorecard or records file: say so on the page
        log.exception("comparison interval %s failed", pk)
        ComparisonInterval.objects.filter(pk=pk).update(
            state=ComparisonInterval.State.FAILED,
            error=f"{type(e).__name__}: {e}"[:500],
            finished_at=timezone.now(),
        )
        return row
    ComparisonInterval.objects.filter(pk=pk, state=ComparisonInterval.State.QUEUED).update(
        state=ComparisonInterval.State.DONE,
        intervals=intervals,
        size_intervals=sizes,
        finished_at=timezone.now(),
    )
    return row


def size_buckets(card):
    """The size buckets of a scorecard (its size slice rows), in the protocol's order."""
    from evaluation.models import SliceScore

    rows = SliceScore.objects.filter(scorecard=card, kind="size", class_name="")
    return list(rows.order_by("pk").values_list("name", flat=True))
