"""Integer scores beyond 2**53 through the platform (``engine.loaders.exact_scores``).

Reference: pycocotools 2.0.11 on the same two files. A file on which it ranks the
integers otherwise than float64 is scored in its order (the ``voc`` evaluation reads
float64, as the devkit's doubles); a file of huge integers it ranks as float64 scores
its numbers too. Both inline (the file loaded whole, the loader cache) and past the
inline size (streamed into pieces at upload, scored in image shards and class groups).
"""

import contextlib
import io
import json

import numpy as np
import pytest

from evaluation import engine
from evaluation.models import Evaluation, Scorecard
from releases import services

from .conftest import detections_for, upload
from .three_uploads import upload_sharded

pytestmark = pytest.mark.django_db

B = 2**60


def _huge(dets, exact):
    """The detections with huge integer scores: in descending score order 1000 apart
    (float64 ranks them as pycocotools does), or B, B + 1, B + 2... in file order
    (pycocotools ranks the later, larger ones first; float64 ties them)."""
    out = [dict(d) for d in dets]
    ranks = np.argsort(np.argsort([-d["score"] for d in dets], kind="stable"), kind="stable")
    for k, d in enumerate(out):
        d["score"] = B + k % 3 if exact else B - 1000 * int(ranks[k])
    return out


def _pycocotools_numbers(evaluation, truth, dets, tmp_path):
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    assert evaluation.state == "done", evaluation.error
    gt, dt = tmp_path / "ref-gt.json", tmp_path / "ref-dt.json"
    gt.write_text(json.dumps(truth))
    dt.write_text(json.dumps(dets))
    with contextlib.redirect_stdout(io.StringIO()):
        coco = COCO(str(gt))
        reference = COCOeval(coco, coco.loadRes(str(dt)), "bbox")
        reference.evaluate()
        reference.accumulate()
        reference.summarize()
    card = Scorecard.objects.get(evaluation=evaluation)
    for key, expected in zip(engine.COCO_SUMMARY_KEYS, reference.stats):
        got = card.summary[key]
        assert (-1.0 if got is None else got) == pytest.approx(expected, abs=1e-12), key


def _evaluations(version):
    return {e.protocol: e for e in Evaluation.objects.filter(prediction_sets__version=version)}


def _check(evaluations, truth, dets, tmp_path):
    assert evaluations["voc"].state == "done", evaluations["voc"].error
    _pycocotools_numbers(evaluations["coco"], truth, dets, tmp_path)


@pytest.mark.parametrize("exact", [True, False])
def test_an_upload_checked_inline(exact, users, detector, split, split_truth, run_tasks, tmp_path):
    """A file within the inline size: loaded whole (through the engine cache)."""
    dets = _huge(detections_for(split_truth), exact)
    version = services.create_version(detector, "1.0", users["engineer"])
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", dets), users["engineer"]
    )
    _check(_evaluations(version), split_truth, dets, tmp_path)


@pytest.mark.parametrize("exact", [True, False])
def test_an_upload_streamed_into_pieces_and_scored_in_shards(
    exact, users, detector, split, split_truth, run_tasks, settings, tmp_path, monkeypatch
):
    """Past the inline size the file is streamed into pieces at upload and scored in
    image shards and class groups: the same numbers."""
    dets = _huge(detections_for(split_truth), exact)
    version = upload_sharded(
        run_tasks, settings, monkeypatch, users, detector, split, dets, label="2.0"
    )
    _check(_evaluations(version), split_truth, dets, tmp_path)
