"""The second chord of a sharded evaluation: class groups merge and score the shards'
records on every worker, and a small callback assembles and stores the result
(``engine.class_groups``).

After every shard has stored its records (cut by class group, each group with its
digest), ``dispatch`` makes one ``EvaluationClassGroup`` row per group of consecutive
classes and sends a chord: ``tasks.score_class_group`` per group without records, then
``tasks.finish_class_groups``. A group task reads only its members of every shard's
records (checked against their digests), merges them, scores its classes
(``scorecard.class_parts``, ``tide.class_parts``) and stores one file under the claim. The
callback joins the groups' parts in class order and takes every mean once — the arrays
of one whole run, so the same numbers bit for bit — writes the evaluation's records file
a column of a group at a time, and stores everything through ``scoring._store`` (the
same transaction, audit event and signals as a one-process run). No task holds all the
records.

Every step runs under the claim of the run that split the evaluation: a task or
callback of a lost claim drops its work; a group stored twice (redelivered) replaces
its file; a callback that finds a group (or a shard) without records stores nothing
and leaves the evaluation to the sweep, whose next claim resends only what is missing
(``sharding.resume``, then ``dispatch`` again).
"""

import contextlib
import logging
import os
import tempfile

from django.db import transaction

from . import engine, image_loo, jobs
from .engine import class_groups as cg
from .engine import records_from_groups, shards
from .models import EvaluationClassGroup, EvaluationShard
from .sharding import _budget, _held, _protocol, discard_files, store_file
from .storage import check_sha256, local_path, verified_path

log = logging.getLogger(__name__)
#: Progress while the class groups run (the shards took it to 85 %).
SPAN = (85, 95)


def dispatch(evaluation_id, claim):
    """Every shard has records: make the class-group rows of their plan (once) and send
    the groups without records, then the final callback."""
    from .scoring import ending

    evaluation = jobs.with_retry(lambda: _held(evaluation_id, claim), "dispatching groups")
    if evaluation is None:
        return
    with ending(evaluation):
        rows = list(evaluation.shards.order_by("index"))
        missing = [r.index for r in rows if not r.records]
        if missing or not rows:
            log.warning("evaluation %s: shards %s have no records yet", evaluation.pk, missing)
            return
        plans = {tuple(map(tuple, r.group_digests.get("plan", []))) for r in rows}
        if len(plans) != 1 or not next(iter(plans)):
            raise ValueError(
                "the shards' records were cut into different class groups (workers with "
                "different BENCHBOOK_CLASS_GROUPS?); score the evaluation again"
            )
        plan = next(iter(plans))

        def make_rows():
            with transaction.atomic():
                jobs.lock_if_held(evaluation)
                for k, (lo, hi) in enumerate(plan):
                    EvaluationClassGroup.objects.get_or_create(
                        evaluation=evaluation,
                        index=k,
                        defaults={"class_start": lo, "class_stop": hi},
                    )
                groups = list(evaluation.class_groups.order_by("index"))
                todo = [g.index for g in groups if not g.records]
                _budget(evaluation, len(todo), len(groups), SPAN)
                transaction.on_commit(lambda: send(evaluation.pk, claim, todo))

        jobs.with_retry(make_rows, f"class groups of evaluation {evaluation.pk}")


def send(evaluation_id, claim, indexes):
    """The chord: group tasks for ``indexes``, then the final callback (tests replace
    this)."""
    from celery import chord

    from .tasks import finish_class_groups, score_class_group

    if not indexes:
        finish_class_groups.delay(evaluation_id, claim)
        return
    header = [score_class_group.si(evaluation_id, claim, k) for k in indexes]
    chord(header)(finish_class_groups.si(evaluation_id, claim))


def _shard_group(row, index):
    """Group ``index`` of one shard's records, checked against the digests the shard
    stored with them (only that group's members are read)."""
    digests = row.group_digests
    with local_path(row.records) as path:
        try:
            return cg.load_group_part(path, index, digests)
        except cg.PartMismatch as e:
            check_sha256(f"shard:{row.pk}", "shard records", row.records.name, e.expected, e.actual)
            raise


def run_group(evaluation_id, claim, index):
    """Merge and score one class group from every shard's records; store its file."""
    from .scoring import ending
    from .services import load_truth_of

    evaluation = jobs.with_retry(lambda: _held(evaluation_id, claim), f"class group {index}")
    if evaluation is None:
        return
    with ending(evaluation), jobs.Lease(evaluation):
        step = jobs.Step(evaluation.pk, f"class group {index}")
        row = EvaluationClassGroup.objects.get(evaluation=evaluation, index=index)
        shard_rows = list(EvaluationShard.objects.filter(evaluation=evaluation).order_by("index"))
        if any(not r.records for r in shard_rows):
            log.warning(
                "evaluation %s: shard records missing; group %s waits", evaluation.pk, index
            )
            return
        truth = load_truth_of(evaluation.split, evaluation.box_policy)  # before the records
        tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
        del truth
        read = [_shard_group(r, index) for r in shard_rows]
        meta = read[0][1]
        group = cg.merge_group([part for part, _ in read], meta, row.class_start, row.class_stop)
        del read
        protocol = _protocol(evaluation)
        parts = cg.group_parts(group, protocol, tag_masks=tag_masks)
        # the group's rows of the per-image list's leave-one-out file (joined at the end)
        loo = image_loo.group_members(group.records, protocol, tag_masks, meta["thresholds"])
        with tempfile.TemporaryDirectory() as work:
            path = os.path.join(work, f"evaluation-{evaluation.pk}-group-{index}.npz")
            cg.save_group(path, group, parts, row.class_start, meta, extra=loo)
            detections = group.records.n_detections
            del group, parts, loo
            jobs.with_retry(
                lambda: _store_group(evaluation, index, path, detections, step.seconds),
                f"storing class group {index} of evaluation {evaluation.pk}",
            )
        step.done()


def _store_group(evaluation, index, path, detections, seconds):
    """The group's file and row in one transaction under the claim (``store_file``)."""
    values = {"detections": detections, "seconds": seconds}
    store_file(evaluation, EvaluationClassGroup, index, path, values, SPAN)


def run_finish(evaluation_id, claim):
    """The groups' chord callback: assemble the scorecard and breakdown from every
    group's parts, write the records file from their records, store under the claim,
    then drop the shard and group files."""
    from .scoring import _store, ending
    from .services import load_truth_of

    evaluation = jobs.with_retry(lambda: _held(evaluation_id, claim), "assembling groups")
    if evaluation is None:
        return
    stored = False
    with ending(evaluation), jobs.Lease(evaluation):
        groups = list(evaluation.class_groups.order_by("index"))
        missing = [g.index for g in groups if not g.records]
        if missing or not groups:
            log.warning("evaluation %s: groups %s have no records yet", evaluation.pk, missing)
            return
        step = jobs.Step(evaluation.pk, f"{len(groups)} class groups assembled and stored")
        first_shard = evaluation.shards.order_by("index").first()
        counts = shards.PredictionCounts(**first_shard.predictions_counts)
        protocol = _protocol(evaluation)
        with contextlib.ExitStack() as stack, tempfile.TemporaryDirectory() as work:
            paths = [
                stack.enter_context(
                    verified_path(
                        g.records, g.records_sha256, f"class group:{g.pk}", "class group records"
                    )
                )
                for g in groups
            ]
            result, breakdown = cg.assemble([cg.load_group_parts(p) for p in paths], protocol)
            truth = load_truth_of(evaluation.split, evaluation.box_policy)
            engine.annotate(result, truth, counts, cg.totals(paths), protocol)
            records_path = os.path.join(work, f"evaluation-{evaluation.pk}.npz")
            records_from_groups.write_records(records_path, paths, truth.n_boxes)
            del truth
            loo = image_loo.join(evaluation, paths, work)
            _store(
                evaluation,
                result,
                None,
                len(counts),
                records_path=records_path,
                breakdown=breakdown,
                loo=loo,
            )
        stored = True
        step.done()
    if stored:
        discard_files(evaluation)
