"""Pieces made at upload: a large predictions file is streamed once, at upload, into
per-shard pieces stored with it; the shards read those, and no process reads the
file whole. A refused or failed upload stores nothing.

References: the pieces are compared, field for field and bit for bit, with the pieces
the platform's whole-file path cuts (``engine.shards.pieces`` of the loaded file), and
the stored numbers with the engine's one-process run on the same files, which the
engine tests hold to pycocotools 2.0.11 and the VOC devkit's rules. Thresholds are
lowered so the 12-image test split is cut into 4 shards and every upload is
"large" (``BENCHBOOK_INLINE_VALIDATION_BYTES = 1``).
"""

import json
import os

import numpy as np
import pytest

from evaluation import engine
from evaluation import pieces as piece_sets
from evaluation import services as evaluation_services
from evaluation.engine import class_groups, shards
from evaluation.engine.loaders import coco_json
from evaluation.models import (
    Evaluation,
    EvaluationShard,
    PredictionFile,
    PredictionPiece,
    PredictionPieces,
    Scorecard,
)
from evaluation.services import predictions as evaluation_predictions
from evaluation.storage import local_path
from releases import services

from ..engine.synthetic import make_detections
from ..engine.test_stream_pieces import _same_piece
from . import test_shards
from .conftest import set_suite_policy, upload
from .test_shards import _run

pytestmark = pytest.mark.django_db
sent = test_shards.sent  # the chord recorder fixture


@pytest.fixture
def large(settings):
    settings.BENCHBOOK_SHARD_ABOVE = 0
    settings.BENCHBOOK_SHARD_IMAGES = 3  # the 12-image split in 4 shards
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 1  # every upload is streamed
    return settings


@pytest.fixture
def tied(split_truth):
    """Ties across shards (5 score levels), records in random image order."""
    return make_detections(np.random.default_rng(15), split_truth, score_levels=5)


def _refuse_whole_reads(monkeypatch):
    """Any whole-file decode of a JSON predictions file fails the test."""

    def refuse(*args, **kwargs):
        raise AssertionError("a predictions file was read whole")

    monkeypatch.setattr(coco_json, "read_detections", refuse)


@pytest.fixture
def no_whole_read(monkeypatch):
    _refuse_whole_reads(monkeypatch)


def _engine_run(tmp_path, split_truth, dets, protocol, **options):
    (tmp_path / "gt.json").write_text(json.dumps(split_truth))
    (tmp_path / "dt.json").write_text(json.dumps(dets))
    truth = engine.load_truth(tmp_path / "gt.json")
    predictions = engine.load_predictions(tmp_path / "dt.json", truth, **options)
    return engine.evaluate(truth, predictions, protocol), predictions


def _reference_pieces(split, dets, tmp_path, **options):
    """The pieces of the whole-file path: the platform's loads, ``shards.pieces``."""
    path = tmp_path / "whole.json"
    path.write_text(json.dumps(dets))
    truth = evaluation_services.load_truth_of(split)
    predictions = evaluation_predictions._load_predictions(path, truth, "p.json", **options)
    out = []
    for k, piece in enumerate(shards.pieces(truth, predictions, shards.plan(12, 3))):
        shards.save_piece(tmp_path / f"ref-{k}.npz", *piece)
        out.append(shards.load_piece(tmp_path / f"ref-{k}.npz"))
    return out


def _piece_files(settings):
    folder = os.path.join(settings.MEDIA_ROOT, "pieces")
    return sorted(os.listdir(folder)) if os.path.isdir(folder) else []


def test_upload_stores_pieces_equal_to_the_whole_paths_and_shards_read_only_them(
    large, split, split_truth, tied, version, users, run_tasks, sent, tmp_path, monkeypatch
):
    reference = _reference_pieces(split, tied, tmp_path)
    _refuse_whole_reads(monkeypatch)
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", tied), users["engineer"]
    )
    (stored,) = PredictionPieces.objects.all()
    assert (stored.images_per_shard, stored.box_policy, stored.unknown_images) == (
        3,
        "keep",
        "reject",
    )
    assert stored.counts["n"] == len(tied)
    rows = list(stored.pieces.order_by("index"))
    assert [(p.image_start, p.image_stop) for p in rows] == shards.plan(12, 3)
    for row, want in zip(rows, reference):
        with local_path(row.file) as path:
            _same_piece(shards.load_piece(path), want)
    assert [indexes for _, _, indexes in sent] == [[0, 1, 2, 3]] * 2  # coco and voc
    shard_rows = EvaluationShard.objects.order_by("evaluation", "index")
    assert {r.piece.name for r in shard_rows} == {p.file.name for p in rows}  # shared
    # class groups planned once, by the split's boxes per class (detections uncounted)
    weights = [split.class_counts[c] for c in split.classes]
    plan = [list(g) for g in class_groups.plan(len(weights), large.BENCHBOOK_CLASS_GROUPS, weights)]
    assert all(r.group_digests == {"plan": plan} for r in shard_rows)
    _run(run_tasks, sent)
    monkeypatch.undo()
    for evaluation in Evaluation.objects.all():
        assert evaluation.state == "done", evaluation.error
        direct, _ = _engine_run(tmp_path, split_truth, tied, evaluation.protocol)
        card = Scorecard.objects.get(evaluation=evaluation)
        assert json.dumps(card.summary, sort_keys=True) == json.dumps(
            direct["summary"], sort_keys=True
        )  # bit for bit
    assert len(_piece_files(large)) == 4  # the pieces outlive the evaluations that read them
    assert not os.listdir(os.path.join(large.MEDIA_ROOT, "shards"))  # shard records removed


def test_a_refused_upload_stores_no_pieces(large, split, split_truth, tied, version, users):
    tied[-2]["image_id"] = 10**9  # a late record names an image the split lacks
    with pytest.raises(engine.InputError, match=f"record {len(tied) - 2}"):
        services.submit_predictions(version, split, upload("p.json", tied), users["engineer"])
    assert not PredictionPieces.objects.exists() and not PredictionPiece.objects.exists()
    assert not PredictionFile.objects.exists()
    assert _piece_files(large) == []


def test_a_streamed_upload_under_the_strict_class_option_refuses_an_unknown_class(
    large, split, tied, detector, version, users
):
    """A suite whose lead picked ``unknown_classes: reject`` refuses classes the split
    lacks on the streamed path too, naming file, record and field; nothing stored."""
    set_suite_policy(detector, users["lead"], unknown_classes="reject")
    tied[-2]["category_id"] = 999
    with pytest.raises(engine.InputError, match="record .*class 999 is not one of the split's"):
        services.submit_predictions(version, split, upload("p.json", tied), users["engineer"])
    assert not PredictionPieces.objects.exists() and not PredictionFile.objects.exists()


def test_a_streamed_upload_drops_unknown_classes_by_default_as_pycocotools(
    large, split, split_truth, tied, version, users, run_tasks, sent, tmp_path, monkeypatch
):
    """By default (the reference behaviour: pycocotools 2.0.11's ``loadRes`` keeps such
    detections, ``evaluate`` never looks at them) the streamed file is accepted; its
    pieces are stored under the drop policy, the sharded result equals the engine's
    one-process run with ``unknown_classes="drop"`` bit for bit, and the result counts
    and names what was left out."""
    tied[-2]["category_id"] = 999
    tied[3]["category_id"] = 77
    _refuse_whole_reads(monkeypatch)
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", tied), users["engineer"]
    )
    (stored,) = PredictionPieces.objects.all()
    assert stored.unknown_classes == "drop"
    assert (stored.counts["dropped"], stored.counts["dropped_classes"]) == (2, ["77", "999"])
    _run(run_tasks, sent)
    monkeypatch.undo()
    for evaluation in Evaluation.objects.all():
        assert evaluation.state == "done", evaluation.error
        assert evaluation.unknown_classes == "drop"
        direct, _ = _engine_run(
            tmp_path, split_truth, tied, evaluation.protocol, unknown_classes="drop"
        )
        card = Scorecard.objects.get(evaluation=evaluation)
        assert json.dumps(card.summary, sort_keys=True) == json.dumps(
            direct["summary"], sort_keys=True
        )
        counts = card.result["counts"]
        assert (counts["dropped_predictions"], counts["dropped_classes"]) == (2, ["77", "999"])


def test_a_failure_while_storing_pieces_leaves_nothing(
    large, split, tied, version, users, monkeypatch
):
    """The third piece cannot be stored: the two already in the storage are deleted,
    the file and the rows roll back."""
    real, calls = piece_sets.file_sha256, []

    def failing(path):
        calls.append(path)
        if len(calls) == 3:
            raise OSError("disk full")
        return real(path)

    monkeypatch.setattr(piece_sets, "file_sha256", failing)
    with pytest.raises(OSError, match="disk full"):
        services.submit_predictions(version, split, upload("p.json", tied), users["engineer"])
    assert len(calls) == 3
    assert not PredictionPieces.objects.exists() and not PredictionFile.objects.exists()
    assert _piece_files(large) == []
    predictions = os.path.join(large.MEDIA_ROOT, "predictions")
    assert not any(files for _, _, files in os.walk(predictions))


def _request(run_tasks, split, dets, scope, protocols=("coco",), **options):
    prediction_file = evaluation_services.store_predictions(upload("older.json", dets))
    return run_tasks(
        evaluation_services.request_evaluations,
        split,
        prediction_file,
        list(protocols),
        scope=scope,
        **options,
    )


def test_a_file_stored_without_pieces_is_streamed_by_the_worker(
    large, split, split_truth, tied, run_tasks, sent, tmp_path, no_whole_read
):
    """Files stored before pieces existed (or by tools): the claiming worker streams
    them into pieces (no whole read), and a later evaluation reuses them."""
    (evaluation,) = _request(run_tasks, split, tied, "older")
    assert PredictionPieces.objects.count() == 1 and len(sent) == 1
    _run(run_tasks, sent)
    evaluation.refresh_from_db()
    assert evaluation.state == "done", evaluation.error
    _request(run_tasks, split, tied, "later")
    assert PredictionPieces.objects.count() == 1 and len(sent) == 2  # reused


def test_a_stored_file_is_streamed_under_its_evaluations_class_policy(
    large, split, split_truth, tied, run_tasks, sent, tmp_path, no_whole_read
):
    """The worker's streaming of a stored file follows the evaluation's class policy:
    under ``drop`` (the default) it is scored with the drop counted and its pieces kept
    under that policy; under ``reject`` the stream refuses the same bytes: the
    evaluation fails naming file, record and field, and no pieces are kept for it."""
    tied[5]["category_id"] = 42
    (dropped,) = _request(run_tasks, split, tied, "drop")
    _run(run_tasks, sent)
    dropped.refresh_from_db()
    assert (dropped.state, dropped.unknown_classes) == ("done", "drop"), dropped.error
    assert dropped.scorecard.result["counts"]["dropped_classes"] == ["42"]
    (strict,) = _request(run_tasks, split, tied, "strict", unknown_classes="reject")
    strict.refresh_from_db()
    assert strict.state == "failed"
    assert "older.json: record 5: field 'category_id': class 42 is not one of" in strict.error
    assert list(PredictionPieces.objects.values_list("unknown_classes", flat=True)) == ["drop"]


def test_a_deleted_piece_is_streamed_again(large, split, tied, run_tasks, sent, no_whole_read):
    _request(run_tasks, split, tied, "first")
    first = PredictionPieces.objects.get()
    gone = first.pieces.get(index=2)
    gone.file.storage.delete(gone.file.name)
    sent.clear()
    (evaluation,) = _request(run_tasks, split, tied, "second")
    (again,) = PredictionPieces.objects.all()
    assert again.pk != first.pk and again.pieces.count() == 4
    _run(run_tasks, sent)
    evaluation.refresh_from_db()
    assert evaluation.state == "done", evaluation.error


def test_another_shard_size_gets_its_own_pieces(large, split, tied, run_tasks, sent):
    _request(run_tasks, split, tied, "three")
    large.BENCHBOOK_SHARD_IMAGES = 5
    _request(run_tasks, split, tied, "five")
    sizes = sorted(PredictionPieces.objects.values_list("images_per_shard", flat=True))
    assert sizes == [3, 5]
    assert [len(indexes) for _, _, indexes in sent] == [4, 3]


def test_a_changed_piece_fails_the_evaluation_loudly(large, split, tied, run_tasks, sent):
    (evaluation,) = _request(run_tasks, split, tied, "t")
    piece = PredictionPieces.objects.get().pieces.get(index=1)
    with open(piece.file.path, "r+b") as f:
        f.seek(100)
        f.write(b"\x00\x01\x02")
    _run(run_tasks, sent)
    evaluation.refresh_from_db()
    assert evaluation.state == "failed" and "does not match its hash" in evaluation.error


def test_unknown_images_dropped_on_a_re_score(
    large, split, split_truth, tied, run_tasks, sent, tmp_path, no_whole_read, monkeypatch
):
    """A stored file scored with ``unknown_images="drop"`` (re-scoring on a later
    revision): detections of images the split lacks are dropped and counted, in its
    own set of pieces, and the numbers are the engine's under the same policy."""
    dets = tied + [{**d, "image_id": 10**6 + k} for k, d in enumerate(tied[:9])]
    (evaluation,) = _request(run_tasks, split, dets, "r", unknown_images="drop")
    stored = PredictionPieces.objects.get()
    assert stored.unknown_images == "drop" and stored.counts["dropped_images"] == 9
    _run(run_tasks, sent)
    evaluation.refresh_from_db()
    assert evaluation.state == "done", evaluation.error
    monkeypatch.undo()
    direct, predictions = _engine_run(tmp_path, split_truth, dets, "coco", unknown_images="drop")
    assert predictions.dropped_images == 9
    card = Scorecard.objects.get(evaluation=evaluation)
    assert json.dumps(card.summary, sort_keys=True) == json.dumps(direct["summary"], sort_keys=True)


def _via(entry, client, detector, split, users, name, content, tmp_path):
    """Upload ``content`` as version 2.0 through ``entry``: the status (or the
    command's error text)."""
    from django.core.management import CommandError, call_command
    from django.urls import reverse

    from .test_api import API, client_for, file

    if entry == "page":
        client.force_login(users["engineer"])
        return client.post(
            reverse("upload", args=[detector.pk]),
            {"version": "2.0", "split": split.pk, "predictions": upload(name, content)},
        ).status_code
    if entry == "api":
        return (
            client_for(users["engineer"])
            .post(
                API + "prediction-sets/",
                {
                    "detector": detector.pk,
                    "version": "2.0",
                    "split": split.pk,
                    "predictions": file(name, content),
                },
                format="multipart",
            )
            .status_code
        )
    path = tmp_path / name
    path.write_text(json.dumps(content))
    try:
        call_command(
            "upload_predictions",
            "--detector", detector.slug, "--label", "2.0", "--split", f"{split.name}:1",
            "--user", "engineer", "--create-version", str(path),
        )  # fmt: skip
    except CommandError as e:
        return str(e)
    return "ok"


@pytest.mark.parametrize("entry", ["page", "api", "command"])
def test_every_entry_point_streams_pieces_and_a_refusal_stores_none(
    entry, large, client, detector, split, tied, users, run_tasks, sent, tmp_path
):
    bad = tied + [{**tied[0], "image_id": 10**9}]
    refused = _via(entry, client, detector, split, users, "bad.json", bad, tmp_path)
    assert refused in (200, 400) or f"record {len(tied)}" in refused  # the page re-renders
    assert not PredictionPieces.objects.exists() and not PredictionFile.objects.exists()
    assert _piece_files(large) == []
    run_tasks(_via, entry, client, detector, split, users, "good.json", tied, tmp_path)
    (stored,) = PredictionPieces.objects.all()
    assert stored.pieces.count() == 4 and len(_piece_files(large)) == 4
