"""Results read "as given" (``loaders.as_given``) with repeated ids together with
integer scores beyond 2**53 or beyond float64's range, against pycocotools 2.0.11.

pycocotools puts the last result of an id in the place of each result of that id
(``createIndex``, ``loadAnns``), then ranks each image's list exactly (Python
integers in numpy) and stops its precision fill at a score float64 cannot hold. The
engine replays its order on the rows as laid out (``as_given.layout``, read by
``loose_scores._affected``); before engine 2.16.1 such files were refused. Checked
against pycocotools 2.0.11 itself: ``coco`` (every summary number and per-class value,
``test_coco_reference._compare``) and ``recall40``'s settings (per-class AP).
"""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, evaluate, load_predictions, load_truth
from evaluation.engine.loaders import results_stream

from .conftest import pycocotools_eval
from .test_as_given import _SPLIT, HEAD, _mixed, det
from .test_beyond_float64_scores import HUGE, paths_agree
from .test_coco_reference import _compare
from .test_exact_scores import pycocotools_recall40
from .test_mask_results import _files

B = 2**60
#: ``test_as_given``'s split with classes named so that ``recall40`` keeps IoU 0.5 for
#: both (it takes 0.7 for a class named car or van; pycocotools_recall40 reads 0.5).
SPLIT = {**_SPLIT, "categories": [{"id": 1, "name": "a"}, {"id": 2, "name": "b"}]}


def _like_pycocotools(tmp_path, dets):
    """Ours equal pycocotools 2.0.11 under coco and recall40's settings (where no id
    leaves a box free: ``recall40`` does not follow pycocotools' ``gtm > 0``, a coco
    rule, ``Protocol.zero_id_unmatched``); returns the loaded predictions."""
    _compare(tmp_path, SPLIT, dets)
    gt, dt = tmp_path / "truth.json", tmp_path / "predictions.json"
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth, unknown_classes="drop")
    if predictions.free is not None:
        return predictions
    ours = evaluate(truth, predictions, "recall40")
    precision = pycocotools_recall40(gt, dt).eval["precision"][0, :, :, 0, 0]
    for k, name in enumerate(truth.classes):
        if np.all(precision[:, k] == -1):
            assert ours["per_class"][name]["AP"] is None, name
        else:
            expected = pytest.approx(np.mean(precision[:, k]), abs=1e-12)
            assert ours["per_class"][name]["AP"] == expected, name
    return predictions


def test_a_repeated_id_carries_its_exact_score(tmp_path):
    """Id 7 twice: its last result (image 2, B + 2) takes the place of the first
    (listed under image 1 first), so image 2's list holds it twice, beside B + 1 and
    B: pycocotools ranks them exactly (float64 ties them); ours equal, the order
    taken."""
    dets = [HEAD, det(7, 1, 1, B, (50, 50, 20, 20)), det(8, 2, 1, B + 1, (50, 50, 20, 20)),
            det(9, 2, 1, B), det(7, 2, 1, B + 2, (10, 10, 20, 20))]  # fmt: skip
    predictions = _like_pycocotools(tmp_path, dets)
    assert predictions.box_counts["replaced_by_id"] == 1
    assert predictions.score_conflicts["100"]


def test_a_repeated_id_carries_a_score_beyond_float64(tmp_path):
    """Id 7's last result holds 2**1024: it stands in both places, and pycocotools'
    fill stops at the first recall point landing on either; -2**1024 repeated after
    every true positive changes nothing."""
    dets = [HEAD, det(7, 1, 1, 0.3), det(8, 1, 1, 0.9, (50, 50, 20, 20)),
            det(7, 2, 1, HUGE), det(4, 3, 2, -HUGE, (70, 70, 5, 5)),
            det(4, 3, 2, -HUGE, (70, 70, 5, 5)), det(5, 3, 2, 0.5, (5, 5, 40, 40))]  # fmt: skip
    predictions = _like_pycocotools(tmp_path, dets)
    assert predictions.overflowing().sum() == 4


POOL = [B, B + 1, B + 2, 2**64 + 1, -(2**63), HUGE, -HUGE, 0.5, 0.25, 1]


@settings(
    max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(st.integers(0, 2**32 - 1))
def test_mixed_files_score_as_pycocotools(tmp_path, seed):
    """``test_as_given``'s random files (repeated, free and odd ids) with scores drawn
    from huge integers, ones beyond float64 and floats: equal to pycocotools 2.0.11;
    where it raises (an id "x" on a matching detection) refused naming ``id``."""
    rng = np.random.default_rng(seed)
    dets = [dict(d, score=POOL[int(rng.integers(len(POOL)))]) for d in _mixed(seed)]
    gt, dt = _files(tmp_path, SPLIT, dets)
    truth = load_truth(gt)
    try:
        evaluate(truth, load_predictions(dt, truth, unknown_classes="drop"), "coco")
    except InputError as error:
        assert error.field == "id"
        with pytest.raises(ValueError):
            pycocotools_eval(gt, dt)
        return
    _like_pycocotools(tmp_path, dets)


def test_every_path_agrees(tmp_path, monkeypatch):
    """Whole, cached, streamed into pieces (read whole: ids reach across the file) and
    sharded runs give the same records and numbers."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 90)
    dets = [HEAD, det(7, 1, 1, B), det(8, 2, 1, B + 1, (50, 50, 20, 20)), det(9, 2, 1, HUGE),
            det(7, 2, 1, B + 2, (50, 50, 20, 20)), det(3, 3, 2, B + 1, (5, 5, 40, 40)),
            det(3, 3, 2, B, (5, 5, 40, 40))]  # fmt: skip
    gt, dt = _files(tmp_path, SPLIT, dets)
    whole = paths_agree(tmp_path, gt, dt)
    assert whole.box_counts["replaced_by_id"] == 2 and whole.score_conflicts["100"]
    _like_pycocotools(tmp_path, dets)
