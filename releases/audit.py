"""The tamper-evident audit trail: append events, verify the chain, keep the head.

After each committed event its ``id hash`` is appended to the file named by
``BENCHBOOK_AUDIT_HEAD_FILE`` (if set) and logged to ``releases.audit.head``, so a copy
of the chain's head lives outside the database (``verify_audit --head FILE``).
"""

import hashlib
import json
import logging
import os
from functools import partial

from django.conf import settings
from django.db import connection, transaction
from django.utils import timezone

from .models import AuditEvent

GENESIS = "0" * 64
head_log = logging.getLogger("releases.audit.head")


def digest(payload):
    """SHA-256 of the payload's canonical JSON (sorted keys, no spaces)."""
    canonical = json.dumps(payload, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(canonical.encode()).hexdigest()


def link_hash(previous_hash, kind, actor, created_at, subject, payload_digest):
    text = "|".join([previous_hash, kind, actor, created_at.isoformat(), subject, payload_digest])
    return hashlib.sha256(text.encode()).hexdigest()


def _lock_chain():
    """One writer at a time appends (SQLite transactions already take the write lock)."""
    if connection.vendor == "postgresql":
        with connection.cursor() as cursor:
            cursor.execute("SELECT pg_advisory_xact_lock(4242)")


def record_event(kind, actor, subject, payload):
    """Append one event after the current head of the chain."""
    with transaction.atomic():
        _lock_chain()
        head = AuditEvent.objects.order_by("-id").values_list("hash", flat=True).first()
        previous = head or GENESIS
        created_at = timezone.now()
        payload_digest = digest(payload)
        actor_name = actor if isinstance(actor, str) else actor.get_username()
        event = AuditEvent.objects.create(
            kind=kind,
            actor=actor_name,
            created_at=created_at,
            subject=subject,
            payload=payload,
            payload_digest=payload_digest,
            previous_hash=previous,
            hash=link_hash(previous, kind, actor_name, created_at, subject, payload_digest),
        )
        transaction.on_commit(partial(write_head, event.pk, event.hash))
        return event


def write_head(event_id, event_hash):
    """Append ``id hash`` to the head file and the head log (after the commit).

    A failed write is logged, never raised: the event is stored already, and
    ``verify_audit --head`` reports a head file that lags behind the chain.
    """
    line = f"{event_id} {event_hash}\n"
    head_log.info("audit head %s %s", event_id, event_hash)
    path = getattr(settings, "BENCHBOOK_AUDIT_HEAD_FILE", None)
    if not path:
        return
    try:  # one write() with O_APPEND: concurrent writers never interleave a line
        fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o640)
        try:
            os.write(fd, line.encode())
            os.fsync(fd)
        finally:
            os.close(fd)
    except OSError:
        head_log.exception("could not append the audit head to %s", path)


def verify_audit():
    """Walk the chain in order. Returns ``(first broken event id or None, head hash, count)``.

    An event is broken if its payload no longer matches its digest, its previous hash is
    not the hash of the event before, or its own hash does not recompute.
    """
    previous = GENESIS
    count = 0
    for event in AuditEvent.objects.order_by("id").iterator():
        count += 1
        expected = link_hash(
            previous, event.kind, event.actor, event.created_at, event.subject, event.payload_digest
        )
        if (
            event.previous_hash != previous
            or event.hash != expected
            or digest(event.payload) != event.payload_digest
        ):
            return event.pk, previous, count
        previous = event.hash
    return None, previous, count
