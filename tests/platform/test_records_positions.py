"""The API's records downloads name each detection by its record's position in the
uploaded file, also where records were left out (red team audit13 F2): in the
one-process run and in the streamed, sharded run alike.

References: pycocotools 2.0.11 (``COCO.loadRes`` numbers results 1..n in file order,
keeping those of unlisted categories, so a result's id is its file position + 1;
``COCOeval.evalImgs`` gives each result's outcome at IoU 0.5, area "all"), and the
engine's own export of a one-process run on the same files, which
``tests/engine/test_record_positions.py`` holds to pycocotools.
"""

import csv
import dataclasses
import io
import json

import pytest
from django.urls import reverse
from rest_framework.test import APIClient

from evaluation import engine, outcomes
from evaluation.engine import export
from evaluation.models import Evaluation
from releases import services, tokens

from ..engine.conftest import pycocotools_eval
from .conftest import detections_for, upload
from .test_shards import _run, sent  # noqa: F401 - the chord recorder fixture
from .test_upload_pieces import large  # noqa: F401 - streamed, sharded uploads

pytestmark = pytest.mark.django_db


def _with_unlisted(split_truth):
    """Detections with records of unlisted categories at the start and among them."""
    dets = detections_for(split_truth)
    for at in (0, 7, 8, 30, len(dets) - 5):
        dets.insert(at, {**dets[at], "category_id": 77, "score": 0.99 - at * 1e-3})
    return dets


def _download(users, evaluation, fmt="csv"):
    _, token = tokens.create_token(users["engineer"], "ci")
    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {token}")
    return api.get(f"/api/v1/evaluations/{evaluation.pk}/records.{fmt}")


def _text(response):
    assert response.status_code == 200, response.content
    return b"".join(response.streaming_content).decode()


def _direct_export(tmp_path, split_truth, dets, protocol):
    (tmp_path / "gt.json").write_text(json.dumps(split_truth))
    (tmp_path / "dt.json").write_text(json.dumps(dets))
    truth = engine.load_truth(tmp_path / "gt.json")
    predictions = engine.load_predictions(tmp_path / "dt.json", truth)
    _, records = engine.evaluate(truth, predictions, protocol, return_records=True)
    return "".join(export.csv_chunks(records, truth))


def _pycocotools_outcomes(tmp_path):
    evaluator = pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
    out = {}
    for e in evaluator.evalImgs:
        if e and e["aRng"] == evaluator.params.areaRng[0]:
            for d, dt_id in enumerate(e["dtIds"]):
                tp = e["dtMatches"][0, d] > 0
                out[dt_id - 1] = "ignored" if e["dtIgnore"][0, d] else ("tp" if tp else "fp")
    return out


def _check(text, dets, reference):
    rows = [r for r in csv.DictReader(io.StringIO(text)) if r["row"] == "detection"]
    assert len(rows) == len(reference)
    for row in rows:
        position = int(row["detection"])
        assert dets[position]["category_id"] != 77
        assert row["score"] == repr(float(dets[position]["score"]))
        assert row["outcome"] == reference[position]


def test_one_process_download_names_file_records(
    users, version, split, split_truth, run_tasks, tmp_path
):
    dets = _with_unlisted(split_truth)
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", dets), users["engineer"]
    )
    evaluation = Evaluation.objects.get(protocol="coco", state="done")
    text = _text(_download(users, evaluation))
    assert text == _direct_export(tmp_path, split_truth, dets, "coco")
    _check(text, dets, _pycocotools_outcomes(tmp_path))


def test_streamed_sharded_download_names_file_records(
    large,  # noqa: F811
    users,
    version,
    split,
    split_truth,
    run_tasks,
    sent,  # noqa: F811
    tmp_path,
):
    dets = _with_unlisted(split_truth)
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", dets), users["engineer"]
    )
    assert sent  # scored in shards, from the pieces streamed at upload
    _run(run_tasks, sent)
    for evaluation in Evaluation.objects.all():
        assert evaluation.state == "done", evaluation.error
        text = _text(_download(users, evaluation))
        assert text == _direct_export(tmp_path, split_truth, dets, evaluation.protocol)
        if evaluation.protocol == "coco":
            _check(text, dets, _pycocotools_outcomes(tmp_path))


def _scored_before_positions(monkeypatch, users, version, split, dets, run_tasks):
    """The coco evaluation as engine 2.22.0 stored it: its version on the evaluation,
    records without ``det_record`` (as such a records file loads)."""
    from evaluation.engine import provenance

    with monkeypatch.context() as patch:
        patch.setattr(provenance, "ENGINE_VERSION", "2.22.0")
        sets = upload("p.json", dets)
        run_tasks(services.submit_predictions, version, split, sets, users["engineer"])
    evaluation = Evaluation.objects.get(protocol="coco", state="done")
    assert evaluation.engine_version == "2.22.0"
    real = outcomes.load_records

    def old_records(card):
        records = real(card)
        assert records.det_record is not None  # today's engine keeps it
        records.det_record = None
        return records

    monkeypatch.setattr(outcomes, "load_records", old_records)
    outcomes._RECORDS.clear()
    return evaluation


def test_old_results_get_positions_from_their_stored_file(
    users, version, split, split_truth, run_tasks, tmp_path, monkeypatch
):
    """Records stored before engine 2.24.0 kept no file positions: the download reads
    them from the stored file when it loads into the records' own detections."""
    dets = _with_unlisted(split_truth)
    evaluation = _scored_before_positions(monkeypatch, users, version, split, dets, run_tasks)
    want = _direct_export(tmp_path, split_truth, dets, "coco")
    want = want.replace(engine.ENGINE_VERSION, "2.22.0")
    assert _text(_download(users, evaluation)) == want
    outcomes._RECORDS.clear()  # without the fix: kept-detection numbers

    def kept_only(card, records):
        records.positions_unknown = False
        return records

    monkeypatch.setattr(outcomes, "with_file_positions", kept_only)
    assert _text(_download(users, evaluation)) != want


def test_old_results_whose_file_no_longer_loads_alike_are_refused(
    client, users, version, split, split_truth, run_tasks, monkeypatch
):
    """Where today's loader reads the stored file into other detections than the old
    records hold, the positions cannot be told: a 409 saying so, never kept-detection
    numbers under the file-position column."""
    dets = _with_unlisted(split_truth)
    evaluation = _scored_before_positions(monkeypatch, users, version, split, dets, run_tasks)
    real = outcomes._predictions

    def shifted(evaluation, truth):
        predictions = real(evaluation, truth)
        return dataclasses.replace(predictions, score=predictions.score + 1e-9)

    monkeypatch.setattr(outcomes, "_predictions", shifted)
    for fmt in ("csv", "jsonl"):
        response = _download(users, evaluation, fmt)
        assert response.status_code == 409
        assert "Score the evaluation again" in response.json()["message"]
    client.force_login(users["engineer"])
    page = client.get(reverse("records-download", args=[evaluation.pk, "csv"]))
    assert page.status_code == 409 and b"Score the evaluation again" in page.content


def test_pieces_streamed_before_positions_are_streamed_again(
    large,  # noqa: F811
    users,
    version,
    split,
    split_truth,
    run_tasks,
    sent,  # noqa: F811
):
    """A stored set of pieces whose counts predate ``record_positions`` (its pieces
    carry no ``Predictions.record``) is not used: deleted, to be streamed again."""
    from evaluation import pieces as piece_sets
    from evaluation.models import PredictionPieces

    dets = _with_unlisted(split_truth)
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", dets), users["engineer"]
    )
    (stored,) = PredictionPieces.objects.all()
    assert stored.counts["record_positions"] is True
    key = {
        "box_policy": stored.box_policy,
        "unknown_images": stored.unknown_images,
        "unknown_classes": stored.unknown_classes,
    }
    assert piece_sets.stored(stored.predictions, split, **key) == stored
    old = {k: v for k, v in stored.counts.items() if k != "record_positions"}
    PredictionPieces.objects.filter(pk=stored.pk).update(counts=old)
    assert piece_sets.stored(stored.predictions, split, **key) is None
    assert not PredictionPieces.objects.exists()
