"""Large evaluations in image shards: a Celery ``group`` of shard tasks and a ``chord``
callback that merges their records and scores once (``engine.shards``).

Above ``BENCHBOOK_SHARD_ABOVE`` (images × detections) the run that claimed the
evaluation reads the predictions file once, writes one *piece* per run of
``BENCHBOOK_SHARD_IMAGES`` images (that run's truth and detections as columns) to the
media storage and sends the chord. Every shard task then reads only its own piece, so a
shard's memory follows the shard, not the split. The result is stored by
``scoring._store`` under the claim, exactly as a one-process run stores it.

Claims and leases (``jobs``): shards run under the claim of the run that split the
evaluation, passed to them; a shard or merge whose claim is no longer the evaluation's
drops its work. While shards wait in the queue nobody renews the lease, so it is set to
one lease per unfinished shard (``_budget``), and a running shard's renewals never
shorten it. A worker killed mid-shard loses that shard only: its message is delivered
again (acks_late) or, when the lease runs out, the sweep requeues the evaluation and the
next claim sends only the shards without records (``resume``).
"""

import dataclasses
import datetime
import logging
import os
import tempfile

import numpy as np
from django.conf import settings
from django.core.files import File
from django.db import transaction
from django.utils import timezone

from . import engine, jobs
from . import pieces as piece_sets
from .engine import class_groups as cg
from .engine import shards
from .models import Evaluation, EvaluationClassGroup, EvaluationShard
from .storage import file_sha256, verified_path, verified_predictions

log = logging.getLogger(__name__)


def wanted(protocol, truth, predictions):
    """Whether to score in shards: an engine protocol (matched per image) on more than
    ``BENCHBOOK_SHARD_ABOVE`` images × detections, spanning more than one shard."""
    size = truth.n_images * len(predictions)
    return (
        isinstance(protocol, engine.Protocol)
        and size > settings.BENCHBOOK_SHARD_ABOVE
        and truth.n_images > settings.BENCHBOOK_SHARD_IMAGES
    )


def _images_per_shard():
    return settings.BENCHBOOK_SHARD_IMAGES


def _ranges(n_images):
    return shards.plan(n_images, settings.BENCHBOOK_SHARD_IMAGES)


def resume(evaluation):
    """Send the unfinished shards of a complete set of pieces written by an earlier
    claim (same plan); False when there is none (the caller reads the files)."""
    rows = list(evaluation.shards.order_by("index"))
    plan = [(r.image_start, r.image_stop) for r in rows]
    if not rows or plan != _ranges(evaluation.split.image_count) or not all(r.piece for r in rows):
        return False
    if not all(shards.PredictionCounts(**r.predictions_counts).record_positions for r in rows):
        return False  # pieces written before they kept file positions: written again
    _dispatch(evaluation, rows)
    return True


def from_pieces(evaluation, protocol):
    """Send the shards of ``evaluation`` from its file's stored pieces (``pieces``:
    made at upload, or streamed here now from the stored file when there are none);
    False when it is not scored that way — another kind of protocol, a split of one
    shard, a label archive or a file too small to stream, or fewer than
    ``BENCHBOOK_SHARD_ABOVE`` images × detections — and the caller reads the files.
    Call it under the evaluation's claim. No whole-file read on this path."""
    split, prediction_file = evaluation.split, evaluation.predictions
    if not isinstance(protocol, engine.Protocol) or split.image_count <= _images_per_shard():
        return False
    options = {
        "box_policy": evaluation.box_policy,
        "unknown_images": evaluation.unknown_images,
        "unknown_classes": evaluation.unknown_classes,
    }
    found = piece_sets.stored(prediction_file, split, **options)
    if found is None:
        found = _stream_stored_file(evaluation, options)
        if found is None:
            return False
    counts = found.counts
    if split.image_count * counts["n"] <= settings.BENCHBOOK_SHARD_ABOVE:
        return False
    _discard(evaluation.shards.all())
    _discard(evaluation.class_groups.all())
    rows = [
        EvaluationShard(
            evaluation=evaluation,
            index=piece.index,
            image_start=piece.image_start,
            image_stop=piece.image_stop,
            detections=piece.detections,
            piece=piece.file.name,
            piece_sha256=piece.sha256,
            predictions_counts=counts,
        )
        for piece in found.pieces.order_by("index")
    ]
    with transaction.atomic():
        jobs.lock_if_held(evaluation)
        EvaluationShard.objects.bulk_create(rows)
    # the pieces' per-class detections are not counted: the split's boxes per class
    # stand in for them (detections mostly follow the boxes)
    _plan_groups(evaluation, [split.class_counts.get(c, 0) for c in split.classes])
    jobs.progress(evaluation, 60)
    _dispatch(evaluation, rows)
    return True


def _stream_stored_file(evaluation, options):
    """Stream the evaluation's stored file (hash-checked) into pieces and store them;
    None when it is not worth it (``pieces.worth_streaming``)."""
    from .services.policy import ENGINE_IDS, _format_of, input_policy
    from .services.stored import load_truth_of

    split, prediction_file = evaluation.split, evaluation.predictions
    fmt = _format_of(evaluation.name)
    if not piece_sets.worth_streaming(split, prediction_file.size, fmt):
        return None
    with verified_predictions(evaluation) as path:
        if engine.is_collection(path):  # a label archive named .json: read whole
            return None
        truth = load_truth_of(split, evaluation.box_policy)
        jobs.progress(evaluation, 25)
        with tempfile.TemporaryDirectory() as work:
            streamed = piece_sets.stream(
                path,
                truth,
                evaluation.name,
                work,
                fmt=fmt,
                boxes=evaluation.box_policy,
                unknown_images=evaluation.unknown_images,
                unknown_classes=input_policy(unknown_classes=evaluation.unknown_classes)[
                    "unknown_classes"
                ],
                ids=ENGINE_IDS,
            )
            del truth
            jobs.progress(evaluation, 50)
            return piece_sets.keep(streamed, prediction_file, split, **options)


def start(evaluation, truth, predictions):
    """Write the pieces of ``truth`` and ``predictions`` (one per shard, replacing any
    of an earlier plan) and send the shards. Call it under the evaluation's claim."""
    _discard(evaluation.shards.all())
    _discard(evaluation.class_groups.all())
    counts = dataclasses.asdict(shards.PredictionCounts.of(predictions))
    ranges = _ranges(truth.n_images)
    rows = []
    per_class = np.zeros(len(truth.classes), np.int64)
    with tempfile.TemporaryDirectory() as work:
        for k, piece in enumerate(shards.pieces(truth, predictions, ranges)):
            per_class += np.bincount(piece[2].cls, minlength=len(truth.classes))
            path = os.path.join(work, f"evaluation-{evaluation.pk}-piece-{k}.npz")
            shards.save_piece(path, *piece)
            row = EvaluationShard(
                evaluation=evaluation,
                index=k,
                image_start=ranges[k][0],
                image_stop=ranges[k][1],
                detections=len(piece[2]),
                piece_sha256=file_sha256(path),
                predictions_counts=counts,
            )
            _save_file(evaluation, row, "piece", path)
            os.remove(path)
            rows.append(row)
            jobs.progress(evaluation, 50 + (k + 1) * 10 // len(ranges))
    _plan_groups(evaluation, per_class)
    _dispatch(evaluation, rows)


def _plan_groups(evaluation, per_class):
    """Decide the class groups once, balanced by ``per_class`` (detections per class, or
    boxes where they are not counted), for every shard to cut its records by (kept on
    the shard rows, so a later claim uses the same)."""
    plan = cg.plan(len(per_class), settings.BENCHBOOK_CLASS_GROUPS, per_class)
    with transaction.atomic():
        jobs.lock_if_held(evaluation)
        evaluation.shards.update(group_digests={"plan": [list(g) for g in plan]})


def _save_file(evaluation, row, field, path):
    """Store ``path`` as ``row.<field>`` and save the row, while the claim is held; the
    file is deleted again if the row does not commit."""
    stored = getattr(row, field)
    try:
        with transaction.atomic():
            jobs.lock_if_held(evaluation)
            with open(path, "rb") as f:
                stored.save(os.path.basename(path), File(f), save=False)
            row.save()
    except BaseException:
        if stored.name:
            stored.storage.delete(stored.name)
        raise


def _dispatch(evaluation, rows):
    """Give the lease its queue budget, then send a chord of the unfinished shards
    (only the merge when none is left) once this transaction commits."""
    todo = [r.index for r in rows if not r.records]
    _budget(evaluation, len(todo), len(rows))
    claim = evaluation.claimed_by
    transaction.on_commit(lambda: send(evaluation.pk, claim, todo))


def send(evaluation_id, claim, indexes):
    """The chord: shard tasks for ``indexes``, then the merge (tests replace this)."""
    from celery import chord

    from .tasks import merge_shards, score_shard

    if not indexes:
        merge_shards.delay(evaluation_id, claim)
        return
    header = [score_shard.si(evaluation_id, claim, k) for k in indexes]
    chord(header)(merge_shards.si(evaluation_id, claim))


def _budget(evaluation, unfinished, total, span=(60, 85)):
    """Progress by finished tasks (50-60 % was reading, 60-85 % the shards, 85-95 %
    the class groups) and a lease of one lease length per unfinished task, at least
    one."""
    lease = datetime.timedelta(seconds=settings.BENCHBOOK_LEASE_SECONDS * max(unfinished, 1))
    low, high = span
    jobs.held(evaluation).update(
        progress=low + (high - low) * (total - unfinished) // max(total, 1),
        lease_expires_at=timezone.now() + lease,
    )


def _held(evaluation_id, claim):
    """The evaluation as claimed by ``claim``, or None when that claim is gone."""
    evaluation = Evaluation.objects.select_related("split", "predictions").get(pk=evaluation_id)
    if evaluation.state != Evaluation.State.RUNNING or evaluation.claimed_by != claim:
        log.info(
            "evaluation %s: claim %s no longer holds it; shard work dropped", evaluation_id, claim
        )
        return None
    return evaluation


def run_shard(evaluation_id, claim, index):
    """Match one shard from its piece and store its records (replacing any earlier
    records of the same shard)."""
    from .scoring import ending

    evaluation = jobs.with_retry(lambda: _held(evaluation_id, claim), f"shard {index}")
    if evaluation is None:
        return
    with ending(evaluation), jobs.Lease(evaluation):
        step = jobs.Step(evaluation.pk, f"shard {index}")
        row = EvaluationShard.objects.get(evaluation=evaluation, index=index)
        with verified_path(
            row.piece, row.piece_sha256, f"shard:{row.pk}", "shard piece", row.piece.name
        ) as path:
            truth, box_index, predictions, positions = shards.load_piece(path)
        protocol = _protocol(evaluation)
        records = shards.match_shard(truth, box_index, predictions, positions, protocol)
        del truth, predictions
        plan = row.group_digests.get("plan") or cg.plan(
            len(records.classes), settings.BENCHBOOK_CLASS_GROUPS
        )
        with tempfile.TemporaryDirectory() as work:
            path = os.path.join(work, f"evaluation-{evaluation.pk}-records-{index}.npz")
            digests = cg.save_shard_records(path, records, box_index, [tuple(g) for g in plan])
            del records
            digests["plan"] = [list(group) for group in plan]
            jobs.with_retry(
                lambda: _store_shard(evaluation, index, path, digests, step.seconds),
                f"storing shard {index} of evaluation {evaluation.pk}",
            )
        step.done()


def _protocol(evaluation):
    from .protocols import resolve

    return resolve(evaluation.protocol)


def _store_shard(evaluation, index, path, digests, seconds):
    """The shard's records file and row in one transaction under the claim."""
    values = {"group_digests": digests, "seconds": seconds}
    store_file(evaluation, EvaluationShard, index, path, values, (60, 85))


def store_file(evaluation, model, index, path, values, span):
    """The records file of one shard or class group (``model``) and its row, with
    ``values``, in one transaction under the claim, and progress over ``span``; a file
    written for a transaction that does not commit is deleted, and one an earlier
    delivery stored for the same row is replaced (deleted after the commit)."""
    written = None
    try:
        with transaction.atomic():
            jobs.lock_if_held(evaluation)
            row = model.objects.select_for_update().get(evaluation=evaluation, index=index)
            replaced = row.records.name or None
            with open(path, "rb") as f:
                row.records.save(os.path.basename(path), File(f), save=False)
            written = row.records.name
            row.records_sha256 = file_sha256(path)
            for name, value in values.items():
                setattr(row, name, value)
            row.finished_at = timezone.now()
            row.save()
            rows = model.objects.filter(evaluation=evaluation)
            _budget(evaluation, rows.filter(records="").count(), rows.count(), span)
    except BaseException:
        if written:
            row.records.storage.delete(written)
        raise
    if replaced:
        row.records.storage.delete(replaced)


def run_merge(evaluation_id, claim):
    """The shards' chord callback: once every shard has records, the class groups
    (``class_groups.dispatch``) merge and score them, on every worker. A callback of a
    lost claim does nothing; one that finds a shard without records leaves the
    evaluation to the sweep (its lease runs out) and the next claim sends that shard
    again."""
    from . import class_groups

    class_groups.dispatch(evaluation_id, claim)


def discard_files(evaluation):
    """Delete the shard and class-group files of a finished evaluation (after its
    result is stored, or after a failure); the rows stay with their timings."""
    _discard(EvaluationShard.objects.filter(evaluation=evaluation), keep_rows=True)
    _discard(EvaluationClassGroup.objects.filter(evaluation=evaluation), keep_rows=True)


def _discard(rows, keep_rows=False):
    """Delete the rows' files (shards: piece and records; class groups: records) after
    the result is stored, or before a new plan; the rows are kept with their timings
    when ``keep_rows``."""
    for row in rows:
        names = ("piece", "records") if isinstance(row, EvaluationShard) else ("records",)
        for field_file in (getattr(row, name) for name in names):
            if field_file.name and not piece_sets.is_shared_piece(field_file.name):
                try:
                    field_file.storage.delete(field_file.name)
                except OSError:
                    log.exception("could not delete %s", field_file.name)
        if keep_rows:
            type(row).objects.filter(pk=row.pk).update(**{name: "" for name in names})
        else:
            row.delete()
