"""Large evaluations in image shards (evaluation/sharding.py): the stored result equals
the one-process run's bit for bit, and every ordering of shard, merge, retry, lost
claim and failure ends the evaluation done once or failed with a message.

The reference is the platform's own one-process path on the same file, which
test_scoring.py holds to the engine and the engine tests to pycocotools and the VOC
devkit's rules. The chord is replaced by a recorder (``sharding.send``), so each test
runs the shard tasks and the merge itself, through Celery's ``apply``, in the order
it wants; test_faults.py does it with real workers.
"""

import json
import os
import uuid

import numpy as np
import pytest
from django.utils import timezone

from evaluation import class_groups, engine, image_loo, jobs, sharding, tasks
from evaluation import services as evaluation_services
from evaluation.models import (
    Evaluation,
    EvaluationClassGroup,
    EvaluationShard,
    ImageLeaveOneOut,
    Scorecard,
)
from evaluation.storage import local_path

from ..engine.synthetic import make_detections
from .conftest import upload

pytestmark = pytest.mark.django_db
PROTOCOLS = ["coco", "voc", "recall40"]  # BENCHBOOK_PROTOCOLS and the third preset it runs


GROUP_SENDS = []


@pytest.fixture
def sent(monkeypatch):
    """The chords the platform sends, as ``(evaluation id, claim, shard indexes)``; the
    class groups' chords go to ``GROUP_SENDS`` (``_run`` runs them after the merge)."""
    calls = []
    GROUP_SENDS.clear()
    monkeypatch.setattr(sharding, "send", lambda *args: calls.append(args))
    monkeypatch.setattr(class_groups, "send", lambda *args: GROUP_SENDS.append(args))
    return calls


@pytest.fixture
def tied(split_truth):
    """Scores on 5 levels: equal scores of one class on images of different shards."""
    return make_detections(np.random.default_rng(15), split_truth, score_levels=5)


def _request(run_tasks, split, dets, scope, protocols=PROTOCOLS):
    prediction_file = evaluation_services.store_predictions(upload("tied.json", dets))
    return run_tasks(
        evaluation_services.request_evaluations, split, prediction_file, protocols, scope=scope
    )


def _apply(run_tasks, task, *args):
    args = json.loads(json.dumps(args))  # as a broker carries them
    return run_tasks(task.apply, args=args, task_id=str(uuid.uuid4()), throw=True)


def _run(run_tasks, sends, order=None, group_order=None):
    for evaluation_id, claim, indexes in sends:
        for k in order or indexes:
            _apply(run_tasks, tasks.score_shard, evaluation_id, claim, k)
        _apply(run_tasks, tasks.merge_shards, evaluation_id, claim)
        _run_groups(run_tasks, group_order)


def _run_groups(run_tasks, order=None):
    """Run the class groups' chords sent so far: each group task, then the callback."""
    while GROUP_SENDS:
        evaluation_id, claim, indexes = GROUP_SENDS.pop(0)
        for k in order or indexes:
            _apply(run_tasks, tasks.score_class_group, evaluation_id, claim, k)
        _apply(run_tasks, tasks.finish_class_groups, evaluation_id, claim)


@pytest.fixture
def sharded(settings):
    settings.BENCHBOOK_SHARD_ABOVE = 0
    settings.BENCHBOOK_SHARD_IMAGES = 3  # the 12-image split in 4 shards
    return settings


def test_sharded_results_equal_the_one_process_run(
    split, tied, run_tasks, sent, settings, tmp_path
):
    _request(run_tasks, split, tied, "whole")
    whole = {e.protocol: e for e in Evaluation.objects.filter(scope="whole")}
    assert not sent and all(e.state == "done" for e in whole.values())
    settings.BENCHBOOK_SHARD_ABOVE = 0
    settings.BENCHBOOK_SHARD_IMAGES = 3
    evaluations = _request(run_tasks, split, tied, "sharded")
    assert [indexes for _, _, indexes in sent] == [[0, 1, 2, 3]] * 3
    assert all(e.state == "running" for e in Evaluation.objects.filter(scope="sharded"))
    _run(run_tasks, sent, order=[3, 1, 0, 2])  # shards finish in any order
    for evaluation in evaluations:
        evaluation.refresh_from_db()
        assert (evaluation.state, evaluation.progress) == ("done", 100), evaluation.error
        ours, reference = evaluation.scorecard, whole[evaluation.protocol].scorecard
        assert json.dumps(ours.result, sort_keys=True) == json.dumps(
            reference.result, sort_keys=True
        )
        # the per-image list's leave-one-out file, joined from the class groups: every
        # member's bytes (their SHA-256) are the one-process file's
        assert image_loo.row_of(ours).members == image_loo.row_of(reference).members
        with local_path(ours.records) as a, local_path(reference.records) as b:
            merged, alone = engine.MatchRecords.load(a), engine.MatchRecords.load(b)
        for name in ("det_order", "det_score", "det_image", "det_reason", "gt_reason"):
            assert getattr(merged, name).tobytes() == getattr(alone, name).tobytes(), name
        rows = EvaluationShard.objects.filter(evaluation=evaluation).order_by("index")
        assert [(r.image_start, r.image_stop) for r in rows] == [(0, 3), (3, 6), (6, 9), (9, 12)]
        assert sum(r.detections for r in rows) == len(tied)
        assert all(r.seconds > 0 and not r.piece and not r.records for r in rows)
    assert not os.listdir(os.path.join(settings.MEDIA_ROOT, "shards"))  # files removed


def test_over_the_leave_one_out_budget_neither_path_stores_the_file(
    split, tied, run_tasks, sent, settings
):
    """Past ``BENCHBOOK_LOO_MAX_BYTES`` neither the one-process nor the sharded run
    stores a leave-one-out file (the per-image list computes on request); the results
    are stored as usual."""
    settings.BENCHBOOK_LOO_MAX_BYTES = 0
    _request(run_tasks, split, tied, "whole", ["coco"])
    settings.BENCHBOOK_SHARD_ABOVE = 0
    settings.BENCHBOOK_SHARD_IMAGES = 3
    _request(run_tasks, split, tied, "sharded", ["coco"])
    _run(run_tasks, sent)
    assert sorted(Evaluation.objects.values_list("state", flat=True)) == ["done", "done"]
    assert Scorecard.objects.count() == 2 and not ImageLeaveOneOut.objects.exists()
    assert not os.path.exists(os.path.join(settings.MEDIA_ROOT, "leave-one-out"))


def test_a_retried_shard_replaces_its_records(split, tied, run_tasks, sent, sharded):
    (evaluation,) = _request(run_tasks, split, tied, "t", ["coco"])
    (evaluation_id, claim, indexes) = sent[0]
    _apply(run_tasks, tasks.score_shard, evaluation_id, claim, 1)
    first = EvaluationShard.objects.get(evaluation=evaluation, index=1).records.name
    _apply(run_tasks, tasks.score_shard, evaluation_id, claim, 1)  # redelivered
    row = EvaluationShard.objects.get(evaluation=evaluation, index=1)
    assert row.records.name != first and EvaluationShard.objects.filter(index=1).count() == 1
    stored = os.listdir(os.path.dirname(row.records.path))
    assert os.path.basename(first) not in stored
    assert sum(name.startswith(f"evaluation-{evaluation.pk}-records") for name in stored) == 1
    evaluation.refresh_from_db()
    assert evaluation.progress == 60 + 25 * 1 // 4  # progress counts finished shards
    _run(run_tasks, sent)
    evaluation.refresh_from_db()
    assert (
        evaluation.state == "done" and Scorecard.objects.filter(evaluation=evaluation).count() == 1
    )


def test_the_merge_run_twice_or_early_stores_once(split, tied, run_tasks, sent, sharded):
    (evaluation,) = _request(run_tasks, split, tied, "t", ["coco"])
    evaluation_id, claim, indexes = sent[0]
    _apply(run_tasks, tasks.score_shard, evaluation_id, claim, 0)
    _apply(run_tasks, tasks.merge_shards, evaluation_id, claim)  # shards 1-3 missing
    evaluation.refresh_from_db()
    assert evaluation.state == "running" and not Scorecard.objects.exists()
    _run(run_tasks, sent)
    _apply(run_tasks, tasks.merge_shards, evaluation_id, claim)  # the callback again
    evaluation.refresh_from_db()
    assert evaluation.state == "done" and Scorecard.objects.count() == 1


def test_a_requeued_evaluation_sends_only_the_shards_without_records(
    split, tied, run_tasks, sent, sharded
):
    """The worker of shard 2 died: the lease runs out, the sweep requeues, the next
    claim reuses the pieces and the three finished shards; the old claim's late
    messages drop their work."""
    (evaluation,) = _request(run_tasks, split, tied, "t", ["coco"])
    evaluation_id, old_claim, _ = sent[0]
    for k in (0, 1, 3):
        _apply(run_tasks, tasks.score_shard, evaluation_id, old_claim, k)
    Evaluation.objects.filter(pk=evaluation_id).update(
        lease_expires_at=timezone.now() - timezone.timedelta(seconds=1)
    )
    assert run_tasks(evaluation_services.requeue_stalled) == [evaluation_id]
    new_id, new_claim, indexes = sent[1]
    assert (new_id, indexes) == (evaluation_id, [2]) and new_claim != old_claim
    _apply(run_tasks, tasks.score_shard, evaluation_id, old_claim, 2)  # late: dropped
    assert not EvaluationShard.objects.get(evaluation=evaluation, index=2).records
    _apply(run_tasks, tasks.merge_shards, evaluation_id, old_claim)  # dropped too
    _run(run_tasks, sent[1:])
    evaluation.refresh_from_db()
    assert (evaluation.state, evaluation.attempts) == ("done", 2)


def _groups_sent(run_tasks, sent):
    """Run every shard and the shards' callback; return the class groups' chord."""
    evaluation_id, claim, indexes = sent[0]
    for k in indexes:
        _apply(run_tasks, tasks.score_shard, evaluation_id, claim, k)
    _apply(run_tasks, tasks.merge_shards, evaluation_id, claim)
    return GROUP_SENDS.pop(0)


def test_a_class_group_run_twice_replaces_its_file_and_the_callback_waits_for_all(
    split, tied, run_tasks, sent, sharded
):
    sharded.BENCHBOOK_CLASS_GROUPS = 2
    (evaluation,) = _request(run_tasks, split, tied, "t", ["coco"])
    evaluation_id, claim, indexes = _groups_sent(run_tasks, sent)
    assert indexes == [0, 1]
    rows = EvaluationClassGroup.objects.filter(evaluation=evaluation).order_by("index")
    ranges = [(r.class_start, r.class_stop) for r in rows]
    assert ranges[0][0] == 0 and ranges[0][1] == ranges[1][0] and ranges[1][1] == 3
    plans = {json.dumps(r.group_digests["plan"]) for r in EvaluationShard.objects.all()}
    assert plans == {json.dumps([list(g) for g in ranges])}  # one plan, by detections
    _apply(run_tasks, tasks.score_class_group, evaluation_id, claim, 1)
    first = EvaluationClassGroup.objects.get(evaluation=evaluation, index=1).records.name
    _apply(run_tasks, tasks.score_class_group, evaluation_id, claim, 1)  # redelivered
    row = EvaluationClassGroup.objects.get(evaluation=evaluation, index=1)
    assert row.records.name != first and not os.path.exists(os.path.join(sharded.MEDIA_ROOT, first))
    assert EvaluationClassGroup.objects.filter(evaluation=evaluation).count() == 2
    evaluation.refresh_from_db()
    assert evaluation.progress == 85 + 10 * 1 // 2  # progress counts finished groups
    _apply(run_tasks, tasks.finish_class_groups, evaluation_id, claim)  # group 0 missing
    evaluation.refresh_from_db()
    assert evaluation.state == "running" and not Scorecard.objects.exists()
    _apply(run_tasks, tasks.merge_shards, evaluation_id, claim)  # the shards' callback again
    assert GROUP_SENDS.pop(0)[2] == [0]  # only the group without a file is sent again
    _apply(run_tasks, tasks.score_class_group, evaluation_id, claim, 0)
    _apply(run_tasks, tasks.finish_class_groups, evaluation_id, claim)
    _apply(run_tasks, tasks.finish_class_groups, evaluation_id, claim)  # again: no-op
    evaluation.refresh_from_db()
    assert evaluation.state == "done" and Scorecard.objects.count() == 1
    assert not any(r.records for r in EvaluationClassGroup.objects.all())  # files removed
    assert all(
        r.seconds > 0 and r.detections is not None for r in EvaluationClassGroup.objects.all()
    )
    assert not os.listdir(os.path.join(sharded.MEDIA_ROOT, "shards"))


def test_class_groups_of_a_lost_claim_drop_their_work(split, tied, run_tasks, sent, sharded):
    """The lease ran out while the groups ran: the sweep requeues, the next claim finds
    every shard with records and sends only the groups without a file; the old claim's
    late group and callback store nothing."""
    sharded.BENCHBOOK_CLASS_GROUPS = 3
    (evaluation,) = _request(run_tasks, split, tied, "t", ["coco"])
    evaluation_id, old_claim, indexes = _groups_sent(run_tasks, sent)
    _apply(run_tasks, tasks.score_class_group, evaluation_id, old_claim, 0)
    Evaluation.objects.filter(pk=evaluation_id).update(
        lease_expires_at=timezone.now() - timezone.timedelta(seconds=1)
    )
    assert run_tasks(evaluation_services.requeue_stalled) == [evaluation_id]
    new_id, new_claim, shard_indexes = sent[1]
    assert shard_indexes == [] and new_claim != old_claim
    _apply(run_tasks, tasks.merge_shards, evaluation_id, new_claim)
    assert GROUP_SENDS.pop(0) == (evaluation_id, new_claim, [1, 2])
    _apply(run_tasks, tasks.score_class_group, evaluation_id, old_claim, 1)  # late: dropped
    assert not EvaluationClassGroup.objects.get(evaluation=evaluation, index=1).records
    _apply(run_tasks, tasks.finish_class_groups, evaluation_id, old_claim)  # dropped too
    assert not Scorecard.objects.exists()
    for k in (2, 1):
        _apply(run_tasks, tasks.score_class_group, evaluation_id, new_claim, k)
    _apply(run_tasks, tasks.finish_class_groups, evaluation_id, new_claim)
    evaluation.refresh_from_db()
    assert (evaluation.state, evaluation.attempts) == ("done", 2)


def test_changed_shard_records_fail_the_group_with_a_message(split, tied, run_tasks, sent, sharded):
    """A group's members of a shard's records no longer match the digest the shard
    stored: the evaluation fails naming the file, nothing is stored, files are removed."""
    sharded.BENCHBOOK_CLASS_GROUPS = 2
    (evaluation,) = _request(run_tasks, split, tied, "t", ["coco"])
    evaluation_id, claim, indexes = sent[0]
    for k in indexes:
        _apply(run_tasks, tasks.score_shard, evaluation_id, claim, k)
    row = EvaluationShard.objects.get(evaluation=evaluation, index=2)
    EvaluationShard.objects.filter(pk=row.pk).update(
        group_digests={**row.group_digests, "g1": "0" * 64}
    )
    _apply(run_tasks, tasks.merge_shards, evaluation_id, claim)
    _run_groups(run_tasks)
    evaluation.refresh_from_db()
    assert evaluation.state == "failed" and not Scorecard.objects.exists()
    assert evaluation.error.startswith("shard records does not match its hash: shards/")
    assert not any(r.records for r in EvaluationClassGroup.objects.all())
    assert not any(r.piece or r.records for r in EvaluationShard.objects.all())


def test_the_lease_covers_the_queued_shards_and_renewals_never_shorten_it(
    split, tied, run_tasks, sent, sharded
):
    (evaluation,) = _request(run_tasks, split, tied, "t", ["coco"])
    evaluation.refresh_from_db()
    budget = (evaluation.lease_expires_at - timezone.now()).total_seconds()
    lease = sharded.BENCHBOOK_LEASE_SECONDS
    assert 4 * lease - 5 < budget <= 4 * lease  # one lease per unfinished shard
    assert jobs.Lease(evaluation).renew()  # what the lease thread does every third
    evaluation.refresh_from_db()
    assert (evaluation.lease_expires_at - timezone.now()).total_seconds() > 3 * lease
    Evaluation.objects.filter(pk=evaluation.pk).update(lease_expires_at=timezone.now())
    assert jobs.Lease(evaluation).renew()  # a short one is extended
    evaluation.refresh_from_db()
    assert (evaluation.lease_expires_at - timezone.now()).total_seconds() > lease - 5


def test_a_changed_piece_fails_the_evaluation_with_a_message(split, tied, run_tasks, sent, sharded):
    (evaluation,) = _request(run_tasks, split, tied, "t", ["coco"])
    row = EvaluationShard.objects.get(evaluation=evaluation, index=2)
    with open(row.piece.path, "ab") as f:
        f.write(b"\0")
    _run(run_tasks, sent)
    evaluation.refresh_from_db()
    assert evaluation.state == "failed" and not Scorecard.objects.exists()
    assert evaluation.error.startswith("shard piece does not match its hash: shards/")
    assert not any(r.piece or r.records for r in EvaluationShard.objects.all())  # files gone


def test_an_unexpected_error_in_a_shard_fails_once_and_the_merge_does_nothing(
    split, tied, run_tasks, sent, sharded, monkeypatch
):
    (evaluation,) = _request(run_tasks, split, tied, "t", ["coco"])

    def broken(*args):
        raise OverflowError("Python int too large to convert to C long")

    monkeypatch.setattr(sharding.shards, "match_shard", broken)
    _run(run_tasks, sent)
    evaluation.refresh_from_db()
    assert evaluation.state == "failed" and evaluation.attempts == 1
    assert "stopped on an unexpected error (OverflowError: Python int" in evaluation.error
    assert not any(r.piece or r.records for r in EvaluationShard.objects.all())  # files gone


def test_small_evaluations_and_single_shards_are_not_split(split, tied, run_tasks, sent, settings):
    settings.BENCHBOOK_SHARD_ABOVE = 0
    settings.BENCHBOOK_SHARD_IMAGES = 12  # the whole split fits one shard
    (evaluation,) = _request(run_tasks, split, tied, "t", ["coco"])
    assert not sent and not EvaluationShard.objects.exists()
    settings.BENCHBOOK_SHARD_IMAGES = 3
    settings.BENCHBOOK_SHARD_ABOVE = 12 * len(tied)  # images x detections, not above
    (evaluation,) = _request(run_tasks, split, tied, "u", ["coco"])
    assert not sent and Evaluation.objects.get(pk=evaluation.pk).state == "done"
