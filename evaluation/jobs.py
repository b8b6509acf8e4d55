"""The life of an evaluation job: claims, leases, retries, the sweep.

``queued`` → ``running`` → ``done`` | ``failed``. A worker *claims* a queued evaluation
(``claimed_by = "<delivery>#<attempt>"``) and holds a *lease* (``lease_expires_at``)
that it renews every third of ``BENCHBOOK_LEASE_SECONDS`` while it scores. Only the
holder of the current claim may finish the evaluation, checked and written in one
transaction with the row locked. The beat sweep puts back to ``queued`` what a dead
worker left running (lease run out) and sends again what the broker lost; it re-checks
the state in the same locked transaction, so it never touches a finished evaluation.
"""

import datetime
import logging
import resource
import threading
import time
import uuid

from django.conf import settings
from django.db import InterfaceError, OperationalError, connection, transaction
from django.db.models import F, Q, Value
from django.db.models.functions import Greatest
from django.utils import timezone

from . import signals
from .models import Evaluation

log = logging.getLogger(__name__)

# What a database outage raises; anything else is not worth retrying.
TRANSIENT = (OperationalError, InterfaceError)
RUNNING, QUEUED = Evaluation.State.RUNNING, Evaluation.State.QUEUED


class ClaimLost(Exception):
    """The evaluation was requeued or claimed again; this run's work is dropped."""


def lease_end(now=None):
    return (now or timezone.now()) + datetime.timedelta(seconds=settings.BENCHBOOK_LEASE_SECONDS)


def with_retry(fn, what):
    """``fn()`` again after transient database errors, with exponential back-off (0.5 s
    doubling to 15 s), for up to ``BENCHBOOK_DB_RETRY_SECONDS``; then the last error.

    ``fn`` must be a whole transaction: a failed one is rolled back before the retry.
    """
    deadline = time.monotonic() + settings.BENCHBOOK_DB_RETRY_SECONDS
    delay = 0.5
    while True:
        try:
            return fn()
        except TRANSIENT as e:
            if time.monotonic() + delay > deadline:
                raise
            log.warning("%s: database unavailable (%s); trying again in %.1f s", what, e, delay)
            if not connection.in_atomic_block:
                connection.close()  # the next query opens a fresh connection
            time.sleep(delay)
            delay = min(delay * 2, 15.0)


def claim(evaluation_id, delivery=None):
    """Take the evaluation for this delivery; the claimed row, or None to drop the message.

    Dropped: a finished evaluation, and one running under another delivery's live
    lease. A redelivery of the same message (its worker was killed) takes it over at
    once; so does any delivery once the lease has run out. Past
    ``BENCHBOOK_MAX_ATTEMPTS`` claims the evaluation fails with the reason.
    """
    delivery = delivery or uuid.uuid4().hex

    def take():
        with transaction.atomic():
            evaluation = Evaluation.objects.select_for_update().get(pk=evaluation_id)
            now = timezone.now()
            if evaluation.finished:
                return None
            if evaluation.state == RUNNING:
                holder = evaluation.claimed_by.rpartition("#")[0]
                alive = evaluation.lease_expires_at and evaluation.lease_expires_at > now
                if alive and holder != delivery:
                    return None  # another delivery is scoring it right now
            if evaluation.attempts >= settings.BENCHBOOK_MAX_ATTEMPTS:
                _mark_failed(
                    evaluation,
                    f"gave up after {evaluation.attempts} attempts that did not finish: the "
                    "worker stopped or lost the database each time (see the worker log)",
                )
                return None
            evaluation.attempts += 1
            evaluation.state = RUNNING
            evaluation.claimed_by = f"{delivery}#{evaluation.attempts}"
            evaluation.started_at = now
            evaluation.lease_expires_at = lease_end(now)
            evaluation.progress = 5
            evaluation.save(
                update_fields=[
                    "state",
                    "attempts",
                    "claimed_by",
                    "started_at",
                    "lease_expires_at",
                    "progress",
                ]
            )
            return evaluation

    return with_retry(take, f"claiming evaluation {evaluation_id}")


def held(evaluation):
    """The evaluation's rows while ``evaluation`` (as claimed) still holds the claim."""
    return Evaluation.objects.filter(
        pk=evaluation.pk, state=RUNNING, claimed_by=evaluation.claimed_by
    )


def lock_if_held(evaluation):
    """Inside a transaction: lock the row; ClaimLost unless this run still holds it."""
    row = Evaluation.objects.select_for_update().get(pk=evaluation.pk)
    if row.state != RUNNING or row.claimed_by != evaluation.claimed_by:
        raise ClaimLost(
            f"evaluation {evaluation.pk} is {row.state} under claim {row.claimed_by or '-'}, "
            f"not {evaluation.claimed_by}"
        )
    return row


def progress(evaluation, percent):
    """Report progress and renew the lease; a lost claim stops the work (ClaimLost).

    A database outage here is only logged: the result is what must reach the database.
    """
    try:
        if not held(evaluation).update(progress=percent, lease_expires_at=lease_end()):
            raise ClaimLost(f"evaluation {evaluation.pk} was taken over")
    except TRANSIENT as e:
        log.warning("evaluation %s: progress not recorded (%s)", evaluation.pk, e)


def _mark_failed(evaluation, message, detail=None):
    evaluation.state = Evaluation.State.FAILED
    evaluation.error = message
    evaluation.error_detail = detail
    evaluation.lease_expires_at = None
    evaluation.finished_at = timezone.now()
    evaluation.save(
        update_fields=["state", "error", "error_detail", "lease_expires_at", "finished_at"]
    )
    signals.result_recorded.send(Evaluation, evaluation=evaluation)
    transaction.on_commit(lambda: signals.evaluation_failed.send(Evaluation, evaluation=evaluation))


def fail(evaluation, message, detail=None):
    """End the claimed evaluation as failed with a message for its users (if this run
    still holds the claim); retried over a database outage."""

    def write():
        with transaction.atomic():
            lock_if_held(evaluation)
            _mark_failed(evaluation, message, detail)

    try:
        with_retry(write, f"failing evaluation {evaluation.pk}")
    except ClaimLost as e:
        log.info("%s; its failure (%s) is not recorded", e, message)


class Lease:
    """While open, a thread renews the claim's lease every third of its length, so the
    sweep can tell a busy worker from a dead one. ``lost`` turns true if the claim was
    taken away meanwhile."""

    def __init__(self, evaluation):
        self.evaluation = evaluation
        self.lost = False
        self._stop = threading.Event()
        self._thread = threading.Thread(
            target=self._run, name=f"lease-{evaluation.pk}", daemon=True
        )

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join(timeout=5)

    def renew(self):
        """Extend the lease to a lease length from now; a longer lease (image shards
        waiting in the queue, ``sharding._budget``) is never shortened. False when the
        claim is no longer held."""
        longer = Greatest(F("lease_expires_at"), Value(lease_end()))
        return bool(held(self.evaluation).update(lease_expires_at=longer))

    def _run(self):
        interval = settings.BENCHBOOK_LEASE_SECONDS / 3
        try:
            while not self._stop.wait(interval):
                try:
                    if not self.renew():
                        self.lost = True
                        return
                except TRANSIENT as e:
                    log.warning("evaluation %s: lease not renewed (%s)", self.evaluation.pk, e)
                    connection.close()
        finally:
            connection.close()  # this thread's own connection


def requeue_stalled():
    """Put back what was lost, return the ids sent again: running evaluations whose
    lease ran out (the worker died or was cut off) become ``queued``, and evaluations
    queued for longer than ``BENCHBOOK_QUEUED_GRACE_SECONDS`` (the broker lost the
    message) are sent again.

    Rows are locked and skipped when a worker holds them (it is storing a result), and
    the UPDATE re-checks state and lease, so a finished evaluation never changes.
    """
    now = timezone.now()
    grace = now - datetime.timedelta(seconds=settings.BENCHBOOK_QUEUED_GRACE_SECONDS)
    lease = datetime.timedelta(seconds=settings.BENCHBOOK_LEASE_SECONDS)
    lost_lease = Q(state=RUNNING) & (
        Q(lease_expires_at__lt=now)
        | Q(lease_expires_at__isnull=True, started_at__lt=now - lease)  # claimed before leases
    )
    waiting = Q(state=QUEUED, queued_at__lt=grace)

    def sweep():
        with transaction.atomic():
            rows = Evaluation.objects.select_for_update(skip_locked=True)
            lost = list(rows.filter(lost_lease).values_list("pk", flat=True))
            again = list(rows.filter(waiting).values_list("pk", flat=True))
            Evaluation.objects.filter(lost_lease, pk__in=lost).update(
                state=QUEUED, claimed_by="", lease_expires_at=None, progress=0, queued_at=now
            )
            Evaluation.objects.filter(waiting, pk__in=again).update(queued_at=now)
            return lost, again

    lost, again = with_retry(sweep, "sweeping evaluations")
    if lost:
        log.warning("evaluations %s: their worker stopped renewing its lease; requeued", lost)
    return lost + again


class Step:
    """Times one step of a worker (wall and CPU seconds) and logs them with the
    process's peak RSS so far (INFO; ``bench/sharded.py`` prints these lines)."""

    def __init__(self, evaluation_id, what):
        self.evaluation_id, self.what = evaluation_id, what
        self.began, self.began_cpu = time.monotonic(), time.process_time()

    @property
    def seconds(self):
        return time.monotonic() - self.began

    def done(self):
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux
        log.info(
            "evaluation %s: %s in %.2f s, %.2f s CPU; worker peak RSS %.0f MB",
            self.evaluation_id,
            self.what,
            self.seconds,
            time.process_time() - self.began_cpu,
            peak,
        )
