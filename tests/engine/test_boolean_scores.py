"""Scores written as JSON booleans against pycocotools 2.0.11 (``loaders.boolean_scores``).

pycocotools 2.0.11 itself is run on each file here (``COCOeval`` under ``coco``'s
parameters, and under ``recall40``'s: one IoU, 40 recall points, no cap): where its
``accumulate`` raises TypeError (numpy's ``-`` on a boolean ``dtScores``), the engine
refuses the file naming file, record and field ``score``; where it scores the file,
the engine scores it and every number equals its numbers.
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, evaluate, load_predictions, load_truth, shards
from evaluation.engine.__main__ import main
from evaluation.engine.loaders import boolean_scores, results_stream
from evaluation.engine.pieces import stream_pieces
from evaluation.engine.protocols import protocol_from_dict

from .conftest import pycocotools_eval
from .test_exact_scores import _det, _numbers_equal, _split, pycocotools_recall40


def _write(tmp_path, split, dets):
    gt, dt = tmp_path / "gt.json", tmp_path / "dt.json"
    gt.write_text(json.dumps(split))
    dt.write_text(json.dumps(dets))
    return gt, dt


def _reference(run, gt, dt):
    """pycocotools 2.0.11's evaluator, or None where its accumulate raises."""
    try:
        with np.errstate(all="ignore"):  # pycocotools runs under numpy's defaults
            return run(gt, dt)
    except TypeError as error:
        assert "boolean negative" in str(error)  # numpy's message for -bool_array
        return None


def _like_reference(tmp_path, split, dets):
    """Ours against pycocotools 2.0.11 under ``coco`` and ``recall40``: refused exactly
    where it raises (naming a boolean-scored record of the file), else equal numbers.
    Returns which of the two it raised under."""
    gt, dt = _write(tmp_path, split, dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    raised = []
    for name, run in (("coco", pycocotools_eval), ("recall40", pycocotools_recall40)):
        reference = _reference(run, gt, dt)
        if reference is None:
            raised.append(name)
            with pytest.raises(InputError) as refused:
                evaluate(truth, predictions, name)
            assert refused.value.field == "score"
            record = int(refused.value.record.split()[1])
            assert type(dets[record]["score"]) is bool, (name, record)
            continue
        ours = evaluate(truth, predictions, name)
        if name == "coco":
            _numbers_equal(reference, ours, truth)
        else:
            precision = reference.eval["precision"][0, :, :, 0, 0]
            for k, cls in enumerate(truth.classes):
                expected = np.mean(precision[:, k]) if np.any(precision[:, k] != -1) else None
                assert ours["per_class"][cls]["AP"] == pytest.approx(expected, abs=1e-12)
    return raised


# Worked cases, one class "a" (id 1), boxes at spot 0 (ground truth) unless said:
# what pycocotools 2.0.11 does is read off its run above, not assumed.
CASES = {
    # one image, its only detection true: every list is [True] -> raises under both
    "lone true": (1, [(1, 1, 0)], [(1, 1, 0, True)], ["coco", "recall40"]),
    # true ranks before 0.5: maxDet 1 joins [True] (coco raises); no cap joins
    # [True, 0.5] as float64 (recall40 scores)
    "true above a number": (1, [(1, 1, 0)], [(1, 1, 0, True), (1, 1, 1, 0.5)], ["coco"]),
    # 0.5 ranks before false: every list holds 0.5
    "number above false": (1, [(1, 1, 0)], [(1, 1, 0, 0.5), (1, 1, 1, False)], []),
    # true and 1 tie; file order puts true first: maxDet 1 joins [True]
    "true tied with 1 before it": (1, [(1, 1, 0)], [(1, 1, 0, True), (1, 1, 1, 1)], ["coco"]),
    # 1 first in the file: maxDet 1 joins [1] (int64)
    "1 tied with true before it": (1, [(1, 1, 0)], [(1, 1, 1, 1), (1, 1, 0, True)], []),
    # image 2 holds ground truth and no detection: an empty float64 list joins in
    "an image with ground truth only": (2, [(1, 1, 0), (2, 1, 0)], [(1, 1, 0, True)], []),
    # image 2 holds neither: not in E, the join stays boolean
    "an image with neither": (2, [(1, 1, 0)], [(1, 1, 0, True)], ["coco", "recall40"]),
    # image 2's only detection is a number
    "another image's number": (2, [(1, 1, 0)], [(1, 1, 0, True), (2, 1, 0, 0.3)], []),
    # class b scores numbers and class a booleans: raised on class a alone
    "one class of two": (
        1,
        [(1, 1, 0), (1, 2, 1)],
        [(1, 2, 1, 0.7), (1, 1, 0, False), (1, 1, 1, True)],
        ["coco", "recall40"],
    ),
}


@pytest.mark.parametrize("case", CASES)
def test_worked_cases_against_pycocotools(tmp_path, case):
    n_images, truth, dets, raised = CASES[case]
    split = _split(n_images, lambda i: [(c, s) for im, c, s in truth if im == i])
    records = [_det(i, c, s, v) for i, c, s, v in dets]
    assert _like_reference(tmp_path, split, records) == raised


def test_numbers_of_zero_and_one_alone_are_scored_without_a_second_read(tmp_path, monkeypatch):
    """Every image's top detection scores 1.0 (numbers, no boolean in the file): a
    candidate class whose file holds no ``true``/``false`` is not read again, and
    pycocotools 2.0.11 scores it (a float64 list)."""
    split = _split(2, lambda i: [(1, 0)])
    records = [_det(1, 1, 0, 1.0), _det(2, 1, 1, 0.0)]

    def no_second_read(*args):
        raise AssertionError("read again")

    monkeypatch.setattr(boolean_scores.exact_scores, "_affected", no_second_read)
    assert _like_reference(tmp_path, split, records) == []


def test_the_refusal_names_the_first_top_boolean_in_file_order(tmp_path):
    """Images 2 and 1 each top-ranked by a boolean (image 2's written first): record 0
    is named; a protocol with a per-image cap of 2 is refused as well (the first two
    of image 1 are booleans, image 2 has one detection), one with a cap of 3 not
    (image 1's third is 0.5), and one under the file order never (VOC family)."""
    split = _split(2, lambda i: [(1, 0)])
    dets = [_det(2, 1, 0, False), _det(1, 1, 0, True), _det(1, 1, 1, True)]
    dets.append(_det(1, 1, 2, 0.5))
    gt, dt = _write(tmp_path, split, dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    with pytest.raises(InputError, match="score false is a boolean") as refused:
        evaluate(truth, predictions, "coco")
    assert (refused.value.record, refused.value.field) == ("record 0", "score")
    for cap, scored in ((2, False), (3, True)):
        spec = {"name": f"coco-{cap}", "base": "coco", "max_detections": cap}
        if scored:
            assert evaluate(truth, predictions, protocol_from_dict(spec))["summary"]
        else:
            with pytest.raises(InputError, match="record 0"):
                evaluate(truth, predictions, protocol_from_dict(spec))
    assert evaluate(truth, predictions, "recall40")["summary"]
    assert evaluate(truth, predictions, "voc")["summary"]


def test_the_command_line_exits_2_naming_file_record_and_field(tmp_path, capsys):
    split = _split(1, lambda i: [(1, 0)])
    gt, dt = _write(tmp_path, split, [_det(1, 1, 1, 0.25), _det(1, 1, 0, True)])
    code = main(["score", "--truth", str(gt), "--predictions", str(dt)])
    err = capsys.readouterr().err
    assert code == 2
    assert f"error: {dt}: record 1: field 'score': score true is a boolean" in err
    assert "Traceback" not in err


@pytest.mark.parametrize("dense", [True, False])
def test_streamed_pieces_and_the_cache_carry_the_refusal(tmp_path, monkeypatch, dense):
    """Read a block at a time into pieces (tiny blocks: image 3's top detection comes
    in a later block than its other one) and loaded through the cache: the same
    entry, and each piece is refused as the whole file is; with the top scores kept
    per (image, class) of the split or as sorted pairs (``DENSE_GROUPS``)."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 256)
    if not dense:
        monkeypatch.setattr(boolean_scores, "DENSE_GROUPS", 0)
    split = _split(4, lambda i: [(1, 0)] if i != 4 else [])
    dets = [_det(i, 1, 0, bool(i % 2)) for i in range(1, 4)]
    dets += [_det(i, 1, 1, 0.0) for i in range(1, 4)] + [_det(3, 1, 2, True)]
    gt, dt = _write(tmp_path, split, dets)
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    assert _reference(pycocotools_eval, gt, dt) is None
    assert whole.score_conflicts[boolean_scores.KEY][0]["record"] == "record 0"
    cached = [load_predictions(dt, truth, cache_dir=str(tmp_path / "c")) for _ in range(2)]
    assert all(c.score_conflicts == whole.score_conflicts for c in cached)
    pieces_dir = tmp_path / "pieces"
    pieces_dir.mkdir()
    streamed = stream_pieces(dt, truth, shards.plan(truth.n_images, 2), str(pieces_dir))
    for path in streamed.paths:
        piece = shards.load_piece(path)[2]
        assert piece.score_conflicts == whole.score_conflicts
        assert piece.score_conflict(protocol_from_dict({"name": "c", "base": "coco"}))


SCORES = st.sampled_from([True, False, True, 1, 0, 0.5, 1.0, 0.0, float("nan")])


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    n_images=st.integers(1, 3),
    truth=st.lists(st.tuples(st.integers(1, 3), st.integers(1, 2), st.integers(0, 2)), max_size=4),
    dets=st.lists(
        st.tuples(st.integers(1, 3), st.integers(1, 2), st.integers(0, 2), SCORES),
        min_size=1,
        max_size=8,
    ),
)
def test_random_files_refused_exactly_where_pycocotools_raises(tmp_path, n_images, truth, dets):
    """Booleans mixed with 1, 0, 0.5 and NaN, tied and in any file order, on images
    with and without detections or ground truth of either class: refused under
    ``coco`` / ``recall40`` exactly where pycocotools 2.0.11 raises, else its numbers."""
    split = _split(n_images, lambda i: [(c, s) for im, c, s in truth if im == i])
    records = [_det(min(i, n_images), c, s, v) for i, c, s, v in dets]
    _like_reference(tmp_path, split, records)
