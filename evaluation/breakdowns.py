"""TIDE's error breakdown of a scorecard (``engine.tide.error_breakdown``), computed once
and stored beside it (``ErrorBreakdown``) so that no page request computes it.

``store`` is the hook of the worker's store step (``scoring._store``, inside the result's
transaction); ``breakdown_of`` reads it, and for a scorecard stored before the hook
existed computes it once from the hash-checked records and stores it.
"""

import json

from django.db import IntegrityError, transaction

from . import engine
from .models import ErrorBreakdown
from .protocols import resolve as resolve_protocol


def compute(records, protocol_name):
    """The breakdown as plain JSON (numpy numbers turned into Python ones)."""
    from .engine import tide

    return _plain(tide.error_breakdown(records, resolve_protocol(protocol_name)))


def _plain(found):
    return json.loads(json.dumps(found, default=lambda value: value.item()))


def store(scorecard, records=None, found=None):
    """Store the breakdown of a scorecard being written from its ``records``, or the
    one a sharded run assembled from its class groups (``found``)."""
    return ErrorBreakdown.objects.create(
        scorecard=scorecard,
        records_sha256=scorecard.records_sha256,
        engine_version=engine.ENGINE_VERSION,
        breakdown=_plain(found) if records is None else compute(records, scorecard.protocol),
    )


def breakdown_of(scorecard):
    """The stored breakdown of ``scorecard``; an older scorecard's is computed from its
    records (``outcomes.records_of``: hash-checked) and stored on first use. Raises the
    records' ``ContentMismatch`` when the file no longer matches its hash."""
    from .outcomes import records_of

    found = _stored(scorecard)
    if found is not None:
        return found
    breakdown = compute(records_of(scorecard), scorecard.protocol)
    try:
        with transaction.atomic():
            ErrorBreakdown.objects.create(
                scorecard=scorecard,
                records_sha256=scorecard.records_sha256,
                engine_version=engine.ENGINE_VERSION,
                breakdown=breakdown,
            )
    except IntegrityError:  # another request stored it meanwhile: read theirs
        return _stored(scorecard) or breakdown
    return breakdown


def _stored(scorecard):
    row = (
        ErrorBreakdown.objects.filter(scorecard=scorecard, records_sha256=scorecard.records_sha256)
        .values_list("breakdown", flat=True)
        .first()
    )
    return row
