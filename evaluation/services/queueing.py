"""Requesting evaluations and getting them scored: one evaluation per protocol, queued
for the worker once the transaction commits, requeued by the beat sweep when lost.
"""

import hashlib
import logging
import os

from django.db import transaction

from .. import engine, jobs
from ..models import Evaluation
from ..protocols import resolve as resolve_protocol
from .policy import input_policy

log = logging.getLogger(__name__)


def request_evaluations(
    split,
    prediction_file,
    protocols,
    *,
    box_policy="keep",
    scope="",
    file_name="",
    unknown_images="reject",
    unknown_classes=None,
):
    """One evaluation per protocol (existing ones of the same ``scope`` are reused),
    dispatched on commit.

    ``unknown_images``: ``reject`` for every upload; ``drop`` only when a stored file is
    re-scored on a later revision of its split (detections of removed images are
    dropped and counted) — another evaluation than the same file under ``reject``.

    ``box_policy`` (``engine.BOX_POLICIES``) and ``unknown_classes``
    (``input_policy``: drop by default, or reject) are part of what is evaluated: the
    same file under another policy is another evaluation. ``scope`` is the requester's opaque
    key: another scope never reuses these rows. ``file_name`` is the file's name as
    this requester uploaded it (kept by a new evaluation, for its messages and, for a
    lone VOC result file, its class: such a name is part of the key).
    """
    if box_policy not in engine.BOX_POLICIES:
        raise engine.InputError(
            "box_policy", f"unknown box policy {box_policy!r}; use {', '.join(engine.BOX_POLICIES)}"
        )
    if unknown_images not in Evaluation.UnknownImages.values:
        raise engine.InputError("unknown_images", f"unknown image policy {unknown_images!r}")
    unknown_classes = input_policy(unknown_classes=unknown_classes)["unknown_classes"]
    if engine.is_voc_result_name(os.path.basename(file_name)):
        # A lone VOC result file's class is in its name: the same bytes under another
        # name are other detections, so another evaluation (its scope says which name).
        named = hashlib.sha256(os.path.basename(file_name).encode()).hexdigest()[:16]
        scope = f"{scope}/voc-result:{named}"
    evaluations = []
    for protocol in protocols:
        resolve_protocol(protocol)
        evaluation, created = Evaluation.objects.get_or_create(
            split=split,
            predictions=prediction_file,
            protocol=protocol,
            box_policy=box_policy,
            scope=scope,
            unknown_images=unknown_images,
            unknown_classes=unknown_classes,
            defaults={"file_name": file_name},
        )
        if created:
            dispatch(evaluation.pk)
        evaluations.append(evaluation)
    return evaluations


def dispatch(evaluation_id):
    """Queue scoring once the current transaction commits.

    If the broker is unreachable the evaluation stays queued and ``requeue_stalled``
    sends it again later.
    """
    from ..tasks import score

    def send():
        try:
            score.delay(evaluation_id)
        except Exception:  # broker down: the sweep will retry
            log.exception("could not queue evaluation %s; the sweep will retry", evaluation_id)

    transaction.on_commit(send)


def requeue_stalled():
    """The beat sweep: requeue what a dead worker or the broker lost (``jobs``), send it."""
    requeued = jobs.requeue_stalled()
    for pk in requeued:
        dispatch(pk)
    return requeued


def run_evaluation(evaluation_id, claim=None):
    """Score one evaluation (``scoring.run_evaluation``, the worker's entry point)."""
    from ..scoring import run_evaluation

    return run_evaluation(evaluation_id, claim)
