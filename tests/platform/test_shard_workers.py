"""Image shards on real worker processes (the fault-worker harness of test_faults.py):
two workers share the shards of one evaluation through the configured broker and
result backend (under CI=true Redis, else the embedded filesystem broker and file
results), and a worker killed in the middle of a shard loses only that shard.
"""

import json
import os
import signal
import time

import pytest
from django.conf import settings as django_settings

from evaluation import engine
from evaluation.models import (
    Evaluation,
    EvaluationClassGroup,
    EvaluationShard,
    PredictionPieces,
    Scorecard,
)

from . import test_faults
from .conftest import detections_for
from .test_faults import _done_exactly_once, _finished, _signal_group, _submit, _wait

workers = test_faults.workers  # the fault-worker fixture

pytestmark = [pytest.mark.integration, pytest.mark.django_db(transaction=True)]
# 12 images: 4 shards; then the classes in 2 groups
SHARDED = {"BENCHBOOK_SHARD_ABOVE": 0, "BENCHBOOK_SHARD_IMAGES": 3, "BENCHBOOK_CLASS_GROUPS": 2}


def test_two_workers_score_the_shards_and_equal_the_engine(
    workers, detector, split, split_truth, users, version, tmp_path
):
    workers(**SHARDED)
    workers(**SHARDED)
    dets = detections_for(split_truth)
    evaluations = _submit(version, split, users, dets)
    _wait(_finished(evaluations), 120, "done")
    _done_exactly_once(evaluations)
    _equal_to_the_engine(evaluations, split_truth, dets, tmp_path)
    for evaluation in evaluations:
        shards = EvaluationShard.objects.filter(evaluation=evaluation)
        assert shards.count() == 4 and all(s.finished_at for s in shards)
        groups = EvaluationClassGroup.objects.filter(evaluation=evaluation)
        assert groups.count() == 2 and all(g.finished_at and not g.records for g in groups)


def _equal_to_the_engine(evaluations, split_truth, dets, tmp_path):
    """Each stored summary and per-class table equals the engine's one-process run on
    the files, bit for bit."""
    (tmp_path / "gt.json").write_text(json.dumps(split_truth))
    (tmp_path / "dt.json").write_text(json.dumps(dets))
    truth = engine.load_truth(tmp_path / "gt.json")
    predictions = engine.load_predictions(tmp_path / "dt.json", truth)
    for evaluation in evaluations:
        card = Scorecard.objects.get(evaluation=evaluation)
        direct = engine.evaluate(truth, predictions, evaluation.protocol)
        as_text = json.dumps(card.summary, sort_keys=True)
        assert as_text == json.dumps(direct["summary"], sort_keys=True)
        assert card.result["per_class"] == json.loads(json.dumps(direct["per_class"]))


def test_a_worker_killed_mid_shard_loses_only_that_shard(
    workers, detector, split, split_truth, users, version, tmp_path
):
    """One worker sleeps in every shard it takes and is killed (SIGKILL) there; the
    other matches the other shards. The lease runs out, the sweep requeues, and the
    next claim sends only the lost shards: the finished ones are not redone.

    The evaluation watched is the one whose shard the doomed worker holds (it logs
    it), whichever of the three that is; the kill waits until the healthy worker has
    matched every other shard of it, not for a quiet spell, so load cannot make the
    test kill too early or wait for a shard that will never finish."""
    workers(beat=True, **SHARDED)
    held_log = tmp_path / "held-shards"
    doomed = workers(BENCHBOOK_FAULT_SLOW_SHARD=600, BENCHBOOK_FAULT_SHARD_LOG=held_log, **SHARDED)
    evaluations = _submit(version, split, users, detections_for(split_truth))
    _wait(lambda: held_log.exists() and held_log.read_text().strip(), 120, "a shard held")
    evaluation_id, held = map(int, held_log.read_text().split()[:2])
    evaluation = evaluations.get(pk=evaluation_id)
    rows = EvaluationShard.objects.filter(evaluation=evaluation)
    # The healthy worker matches every shard of it the doomed one does not hold (on
    # the embedded broker the doomed one may also hold the next message it fetched).
    _wait(lambda: _settled(rows, held), 180, "the healthy worker's shards matched")
    before = {r.index: r.finished_at for r in rows.all() if r.finished_at}
    lost = set(range(4)) - set(before)
    assert held in lost and before
    _signal_group(doomed, signal.SIGKILL)
    doomed.wait(10)
    killed_at = time.monotonic()
    _wait(_finished(evaluations), 180, "done after the kill")
    print(f"recovered {time.monotonic() - killed_at:.1f} s after the kill")
    _done_exactly_once(evaluations)
    evaluation.refresh_from_db()
    assert evaluation.attempts == 2
    after = {r.index: r.finished_at for r in rows.all()}  # read again, not the cache
    assert {k: after[k] for k in before} == before  # finished shards were not redone
    assert all(after[k] > max(before.values()) for k in lost)
    shards_dir = os.path.join(django_settings.MEDIA_ROOT, "shards")
    assert not os.listdir(shards_dir)  # pieces and shard records removed, none orphaned
    assert Evaluation.objects.get(pk=evaluation.pk).state == "done"


def _settled(rows, held, quiet=4.0):
    """Every shard but ``held`` has records. On the embedded broker, where the doomed
    worker may hold one more message, also: some shards matched, and no other for
    ``quiet`` seconds (under Redis its prefetch of 1 holds no second message)."""
    done = set(rows.exclude(records="").values_list("index", flat=True))
    if held in done or not done:
        return False
    if done == set(range(4)) - {held}:
        return True
    if test_faults.CI:
        return False
    time.sleep(quiet)
    return set(rows.exclude(records="").values_list("index", flat=True)) == done


def test_pieces_made_at_upload_are_scored_by_two_workers(
    workers, detector, split, split_truth, users, version, settings, tmp_path
):
    """The upload streams the file into pieces (``evaluation/pieces.py``); the workers
    score the shards from them and never read the file whole (the engine cache holds
    the split's columns only), with the engine's numbers."""
    settings.BENCHBOOK_SHARD_ABOVE, settings.BENCHBOOK_SHARD_IMAGES = 0, 3
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 1  # every upload is streamed
    workers(**SHARDED, BENCHBOOK_INLINE_VALIDATION_BYTES=1)
    workers(**SHARDED, BENCHBOOK_INLINE_VALIDATION_BYTES=1)
    dets = detections_for(split_truth)
    evaluations = _submit(version, split, users, dets)
    assert PredictionPieces.objects.get().pieces.count() == 4
    _wait(_finished(evaluations), 120, "done")
    _done_exactly_once(evaluations)
    cache = django_settings.BENCHBOOK_ENGINE_CACHE
    assert len(os.listdir(cache)) == 1  # the split's columns only: no whole-file load
    _equal_to_the_engine(evaluations, split_truth, dets, tmp_path)
    assert len(os.listdir(os.path.join(django_settings.MEDIA_ROOT, "pieces"))) == 4
