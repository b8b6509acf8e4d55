"""The worker's scoring path: claim, score under a lease, store only while holding the
claim (``jobs``); every run ends ``done`` or ``failed`` with a readable cause."""

import contextlib
import logging
import os
import tempfile

from django.core.files import File
from django.db import transaction
from django.utils import timezone

from . import breakdowns, engine, image_loo, jobs, levels, sharding, signals
from .models import ClassScore, Evaluation, PredictionFile, Scorecard, SliceScore
from .protocols import resolve as resolve_protocol
from .rows import class_rows, slice_rows
from .services.predictions import _load_predictions
from .services.stored import load_truth_of
from .storage import ContentMismatch, file_sha256, verified_predictions

log = logging.getLogger(__name__)


def run_evaluation(evaluation_id, claim=None):
    """Score one evaluation; a finished one is left alone (idempotent).

    ``claim`` identifies the delivery (the task id); ``jobs.claim`` decides whether
    this delivery may score it. Every run ends the evaluation ``done`` or ``failed``
    with a message for its users — bad input with the engine's message (file, record,
    field), stored content that no longer matches its hash loudly, any other error
    with its type and text (traceback to the log), because retrying cannot help. Only
    database outages are retried (``jobs.with_retry``); past that window the sweep
    requeues the evaluation when its lease runs out.
    """
    evaluation = jobs.claim(evaluation_id, claim)
    if evaluation is None:
        return Evaluation.objects.get(pk=evaluation_id)
    with ending(evaluation), jobs.Lease(evaluation):
        step = jobs.Step(evaluation.pk, "claimed run")
        scored = _score(evaluation)
        if scored is not None:  # None: split into image shards, whose merge stores it
            _store(evaluation, *scored)
        step.done()
    return evaluation


@contextlib.contextmanager
def ending(evaluation):
    """How every run under a claim ends (one evaluation, one shard, one merge): the
    errors named in ``run_evaluation`` fail the evaluation with their message, a lost
    claim drops the work, a database outage past the retry window propagates."""
    try:
        yield
    except engine.InputError as e:
        e.path = os.path.basename(e.path)  # stored under its original name
        jobs.fail(evaluation, str(e), e.as_dict())
    except ContentMismatch as e:
        log.error("evaluation %s: %s", evaluation.pk, e)
        jobs.fail(evaluation, str(e), e.as_dict())
    except jobs.ClaimLost as e:
        log.info("evaluation %s: result dropped, %s", evaluation.pk, e)
    except jobs.TRANSIENT:
        raise  # past the retry window: the sweep requeues it when the lease runs out
    except Exception as e:
        log.exception("evaluation %s: unexpected error while scoring", evaluation.pk)
        jobs.fail(
            evaluation,
            f"scoring {evaluation.name} on {evaluation.split} stopped on "
            f"an unexpected error ({type(e).__name__}: {e}); a retry would fail the same way "
            "(the traceback is in the worker log)",
            {"exception": type(e).__name__, "message": str(e)},
        )


def _score(evaluation):
    """``(result, records, record_count)``, or None when the evaluation was handed to
    image shards (``sharding``), which finish it."""
    if sharding.resume(evaluation):  # pieces an earlier claim wrote: unfinished shards
        return None
    protocol = resolve_protocol(evaluation.protocol)
    if sharding.from_pieces(evaluation, protocol):  # the file's pieces, never read whole
        return None
    split = evaluation.split
    truth = load_truth_of(split, evaluation.box_policy)
    jobs.progress(evaluation, 25)
    with verified_predictions(evaluation) as path:
        predictions = _load_predictions(
            path,
            truth,
            evaluation.name,
            evaluation.box_policy,
            unknown_images=evaluation.unknown_images,
            unknown_classes=evaluation.unknown_classes,
        )
    jobs.progress(evaluation, 50)
    if isinstance(protocol, levels.LevelProtocol):  # per level × class (evaluation/levels.py)
        return levels.score(evaluation, truth, predictions)
    if sharding.wanted(protocol, truth, predictions):
        sharding.start(evaluation, truth, predictions)
        return None
    records = engine.match(truth, predictions, protocol)
    jobs.progress(evaluation, 75)
    tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
    result = engine.score_records(records, protocol, tag_masks=tag_masks)
    engine.annotate(result, truth, predictions, records, protocol)
    return result, records, len(predictions)


def _store(
    evaluation,
    result,
    records,
    record_count,
    *,
    records_path=None,
    breakdown=None,
    loo=None,
):
    """Write the result, if this run still holds the claim: the check and every row in
    one transaction with the evaluation locked. The records file is written inside it
    and deleted if the transaction does not commit (no orphan files).

    A sharded run, which never holds its records whole, passes ``records=None``, the
    records file it wrote (``records_path``), its assembled TIDE ``breakdown`` and the
    per-image list's leave-one-out file its class groups joined (``loo``: an
    ``image_loo.Prepared``, or None over the budget: the list then computes on request).
    A one-process run computes that file here (``image_loo.prepare``)."""
    with tempfile.TemporaryDirectory() as work:
        if records is not None:
            records_path = os.path.join(work, f"evaluation-{evaluation.pk}.npz")
            records.save(records_path)
        records_sha256 = file_sha256(records_path)
        # Each image's leave-one-out AP for the per-image list: computed before the
        # transaction (the long part), stored inside it.
        if levels.is_levels(result):
            loo = None
        elif records is not None:
            loo = image_loo.prepare(evaluation, records, work)
        stored_loo = None

        def write():
            nonlocal stored_loo
            scorecard = Scorecard(
                evaluation=evaluation,
                protocol=result["protocol"],
                protocol_version=result["protocol_version"],
                engine_version=result["engine_version"],
                split_sha256=evaluation.split.sha256,
                predictions_sha256=evaluation.predictions.sha256,
                summary=result["summary"],
                result=result,
                records_sha256=records_sha256,
            )
            try:
                with transaction.atomic():
                    jobs.lock_if_held(evaluation)
                    with open(records_path, "rb") as f:
                        scorecard.records.save(os.path.basename(records_path), File(f), save=False)
                    scorecard.save()
                    ClassScore.objects.bulk_create(class_rows(scorecard, result))
                    SliceScore.objects.bulk_create(slice_rows(scorecard, result))
                    if not levels.is_levels(result):  # a level result has no match records
                        breakdowns.store(scorecard, records, breakdown)
                        if loo is not None:
                            stored_loo = image_loo.store(scorecard, loo)
                    PredictionFile.objects.filter(pk=evaluation.predictions_id).update(
                        record_count=record_count
                    )
                    evaluation.state = Evaluation.State.DONE
                    evaluation.progress = 100
                    evaluation.engine_version = result["engine_version"]
                    evaluation.lease_expires_at = None
                    evaluation.finished_at = timezone.now()
                    evaluation.save(
                        update_fields=[
                            "state",
                            "progress",
                            "engine_version",
                            "lease_expires_at",
                            "finished_at",
                        ]
                    )
                    signals.result_recorded.send(Evaluation, evaluation=evaluation)
                    transaction.on_commit(
                        lambda: signals.evaluation_finished.send(Evaluation, evaluation=evaluation)
                    )
            except BaseException:
                if scorecard.records.name:  # written, but the rows were not: no orphan file
                    _delete_quietly(scorecard.records)
                image_loo.discard(stored_loo)
                raise

        jobs.with_retry(write, f"storing the result of evaluation {evaluation.pk}")


def _delete_quietly(field_file):
    try:
        field_file.storage.delete(field_file.name)
    except OSError:
        log.exception("could not delete %s after a failed store", field_file.name)
