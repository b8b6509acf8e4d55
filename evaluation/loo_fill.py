"""Fill in the per-image leave-one-out file (``image_loo``) of scorecards stored without
one in the current engine version and layout: evaluations scored before the file
existed, by another engine version, or a sharded run whose class groups did not pass
their parts. Until then the per-image list computes their leave-one-out AP on every
request (seconds to tens of seconds at 5,000 images and 80 classes).

``fill`` is what the worker does when it stores a result, for one scorecard: the
records read and checked against their SHA-256 (a changed file is refused and
signalled for the audit trail, never used), ``image_loo.prepare`` outside the
transaction (the long part), ``image_loo.store`` inside it with the scorecard's row
locked — the row and its file stored together or not at all. Idempotent: a scorecard
that has its row is left alone, so a second run does nothing; rows are append-only
(a newer engine version adds a row beside the old one). Called by
``manage.py fill_leave_one_out`` and the Celery task ``evaluation.tasks.fill_leave_one_out``
(one per scorecard, enqueued by ``manage.py fill_leave_one_out --queue``).
"""

import logging
import tempfile
import time
from dataclasses import dataclass

from django.db import transaction

from . import engine, image_loo
from .levels import LEVEL_PROTOCOLS
from .models import Evaluation, ImageLeaveOneOut, Scorecard
from .services import load_records

log = logging.getLogger(__name__)


def wanting(evaluation_ids=None):
    """Scorecards the per-image list would compute on request, oldest first: finished
    evaluations' match-records scorecards (not level protocols, which have none)
    without a row in the current engine version and layout. ``evaluation_ids``
    narrows them."""
    current = ImageLeaveOneOut.objects.filter(
        engine_version=engine.ENGINE_VERSION, format=image_loo.FORMAT
    ).values("scorecard_id")
    cards = (
        Scorecard.objects.filter(evaluation__state=Evaluation.State.DONE)
        .exclude(protocol__in=list(LEVEL_PROTOCOLS))
        .exclude(records="")
        .exclude(pk__in=current)
        .select_related("evaluation", "evaluation__split")
        .defer("result")
        .order_by("pk")
    )
    if evaluation_ids is not None:
        cards = cards.filter(evaluation_id__in=evaluation_ids)
    return cards


@dataclass
class Filled:
    """What ``fill`` did: ``stored`` (a new row), ``present`` (nothing to do) or
    ``skipped`` (nothing to fill: a level protocol, no records, or a file over the
    budget ``BENCHBOOK_LOO_MAX_BYTES``); the row, seconds of CPU spent."""

    scorecard: Scorecard
    status: str
    row: ImageLeaveOneOut | None = None
    cpu_seconds: float = 0.0
    reason: str = ""


def fill(scorecard_id):
    """Store the scorecard's leave-one-out file if it has none (see the module).
    Raises ``storage.ContentMismatch`` for a records file (or split) that no longer
    holds the content hashed when it was stored; nothing is stored then."""
    started = time.process_time()
    card = Scorecard.objects.select_related("evaluation", "evaluation__split").get(pk=scorecard_id)
    if card.protocol in LEVEL_PROTOCOLS or not card.records:
        return Filled(card, "skipped", reason="a level protocol's result has no match records")
    row = image_loo.row_of(card)
    if row is not None:
        return Filled(card, "present", row)
    records = load_records(card)  # hash-checked: a changed file raises, audited
    with tempfile.TemporaryDirectory() as work:
        prepared = image_loo.prepare(card.evaluation, records, work)
        del records
        if prepared is None:  # over BENCHBOOK_LOO_MAX_BYTES: the list computes on request
            return Filled(
                card,
                "skipped",
                cpu_seconds=time.process_time() - started,
                reason="the file would exceed BENCHBOOK_LOO_MAX_BYTES",
            )
        stored = None
        try:
            with transaction.atomic():
                # The scorecard's row locked: a concurrent fill waits, then finds the row.
                list(Scorecard.objects.select_for_update().filter(pk=card.pk).values_list("pk"))
                row = image_loo.row_of(card)
                if row is not None:
                    return Filled(card, "present", row, time.process_time() - started)
                stored = image_loo.store(card, prepared)
        except BaseException:
            image_loo.discard(stored)  # the transaction did not commit: no orphan file
            raise
    log.info("leave-one-out file stored for scorecard %s", card.pk)
    return Filled(card, "stored", stored, time.process_time() - started)
