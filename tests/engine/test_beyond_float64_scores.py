"""Integer scores beyond float64's range (2**1024 written out in digits) scored as
pycocotools 2.0.11 scores them (``loaders.beyond_float64``, ``average_precision.fill_stops``).

pycocotools keeps such a score as a Python ``int`` (ranked exactly, in object arrays);
its ``accumulate`` then writes ``ss[ri] = dtScoresSorted[pi]`` into a float64 array
inside ``try: ... except: pass``: the OverflowError is swallowed after ``q[ri]`` is
set, so every later recall point keeps precision 0. The engine reads the score as
±infinite, ranks it in pycocotools' exact order and stops its fill at the same place.
Every case runs pycocotools 2.0.11 itself (``coco``: every summary number, per-class
AP and AP50, each image's and class's order; ``recall40``: its settings, no cap) and
shows, where it matters, that the same file with the score written as a float scores
otherwise (the cut is real).
"""

import json
import math
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import (
    evaluate,
    load_predictions,
    load_truth,
    match,
    score_records,
    shards,
)
from evaluation.engine.loaders import results_stream
from evaluation.engine.per_image import leave_one_out, leave_one_out_metrics
from evaluation.engine.pieces import stream_pieces
from evaluation.engine.scoring import headline

from .conftest import pycocotools_eval
from .test_class_groups import whole_and_grouped
from .test_exact_order_paths import _coco_equal, _inputs, weighted_equals_duplicated
from .test_exact_scores import (
    _det,
    _recall40_like_reference,
    _score_like_reference,
    _split,
    _write,
    pycocotools_recall40,
)

HUGE = 2**1024  # float() raises OverflowError
RECALL40 = [k / 40 for k in range(1, 41)]


def _as_float(value):
    if type(value) is int and abs(value) >= 2**1024:
        return math.inf if value > 0 else -math.inf  # json.dumps writes Infinity
    return value


def _precision(tmp_path, split, dets, protocol, name="dt.json"):
    """pycocotools 2.0.11's precision of class ``a`` at IoU 0.5 (all areas, its last
    cap) on the file: 101 points (``coco``) or 40 (``recall40``'s settings)."""
    gt, dt = _write(tmp_path, split, dets, name)
    if protocol == "coco":
        return pycocotools_eval(gt, dt).eval["precision"][0, :, 0, 0, 2]
    return pycocotools_recall40(gt, dt).eval["precision"][0, :, 0, 0, 0]


def _like_pycocotools(tmp_path, split, dets):
    """Ours equal pycocotools 2.0.11 under ``coco`` and ``recall40``; returns, per
    protocol, whether its fill was cut (it differs from the file written as floats)."""
    cut = {}
    for protocol in ("coco", "recall40"):
        exact = _precision(tmp_path, split, dets, protocol)
        floats = [{**d, "score": _as_float(d["score"])} for d in dets]
        as_float = _precision(tmp_path, split, floats, protocol, "dt-f.json")
        cut[protocol] = not np.array_equal(exact, as_float)
    assert _score_like_reference(tmp_path, split, dets) != "the reference raises"
    _recall40_like_reference(tmp_path, split, dets)
    return cut


def _filled(tmp_path, split, dets, protocol):
    """How many recall points pycocotools 2.0.11 fills (nonzero precision)."""
    return int(np.count_nonzero(_precision(tmp_path, split, dets, protocol)))


def test_one_matching_detection(tmp_path):
    """One detection of score 2**1024 on the only box: pycocotools 2.0.11 fills only
    its first recall point (AP 1/101 under coco, 1/40 under recall40); ours equal. The
    engine shows the score as infinite; the VOC protocols score it so (AP 1)."""
    split = _split(1, lambda i: [(1, 0)])
    dets = [_det(1, 1, 0, HUGE)]
    assert _filled(tmp_path, split, dets, "coco") == 1
    assert _filled(tmp_path, split, dets, "recall40") == 1
    assert _like_pycocotools(tmp_path, split, dets) == {"coco": True, "recall40": True}
    gt, dt = _write(tmp_path, split, dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    records = match(truth, predictions, "coco")
    assert records.det_score.tolist() == [math.inf] and records.det_overflow.tolist() == [True]
    # the VOC devkit reads doubles (from memory): infinite, nothing stops there
    assert match(truth, predictions, "voc").det_overflow is None
    assert evaluate(truth, predictions, "voc")["per_class"]["a"]["AP"] == 1.0


@pytest.mark.parametrize("sign", [1, -1])
def test_the_fill_stops_at_the_recall_point_landing_on_it(tmp_path, sign):
    """Two boxes found by a float (image 1) and by ±2**1024 (image 2, ranked first or
    last): pycocotools 2.0.11 fills the points up to the one reaching the huge score's
    true positive, then stops (2**1024 first: 1 point under coco, 1 under recall40;
    -2**1024 last: 52 of 101, 21 of 40)."""
    split = _split(2, lambda i: [(1, 0)])
    dets = [_det(1, 1, 0, 0.9), _det(2, 1, 0, sign * HUGE)]
    expected = {"coco": 1, "recall40": 1} if sign > 0 else {"coco": 52, "recall40": 21}
    for protocol, count in expected.items():
        assert _filled(tmp_path, split, dets, protocol) == count
    assert _like_pycocotools(tmp_path, split, dets) == {"coco": True, "recall40": True}


def test_recall_zero_reads_the_first_detection_whatever_it_is(tmp_path):
    """pycocotools' recall point 0 reads index 0 (``searchsorted(rc, 0)``): the class's
    first detection, here a false positive of score 2**1024, stops the fill after that
    point under coco (1 point filled); recall40 has no point at 0 and never reads it."""
    split = _split(2, lambda i: [(1, 0)])
    dets = [_det(1, 1, 2, HUGE), _det(1, 1, 0, 0.9), _det(2, 1, 0, 0.8)]
    assert _filled(tmp_path, split, dets, "coco") == 1
    assert _like_pycocotools(tmp_path, split, dets) == {"coco": True, "recall40": False}


def test_a_huge_score_no_recall_point_reaches(tmp_path):
    """-2**1024 on a false positive after every true positive, and 2**1024 in a class
    without ground truth (``npig == 0`` skips the fill) or one the split does not
    list: no recall point lands on them, nothing changes (equal to the file written
    as floats, and to pycocotools 2.0.11)."""
    split = _split(2, lambda i: [(1, 0)])
    dets = [_det(1, 1, 0, 0.9), _det(2, 1, 0, 0.8), _det(2, 1, 2, -HUGE)]
    dets += [_det(1, 2, 1, HUGE), _det(2, 9, 1, HUGE)]
    assert _like_pycocotools(tmp_path, split, dets) == {"coco": False, "recall40": False}


def test_ties_and_mixed_classes(tmp_path):
    """2**1024 + 1 and 2**1024 (pycocotools ranks them exactly: the later, larger one
    first), an equal pair of 2**1024 on two images (a tie: image order), a float
    infinity (``1e400``, ranked before every integer: no overflow, it is a float) and
    floats and 2**60 in one class's lists (object arrays): equal to pycocotools
    2.0.11."""
    split = _split(3, lambda i: [(1, 0), (1, 1), (2, 2)])
    dets = [
        _det(1, 1, 1, HUGE),
        _det(1, 1, 0, HUGE + 1),
        _det(2, 1, 0, HUGE),
        _det(3, 1, 1, HUGE),
        _det(2, 1, 1, math.inf),
        _det(3, 1, 0, 0.5),
        _det(2, 2, 2, 2**60),
        _det(3, 2, 2, 0.25),
        _det(1, 2, 2, -HUGE),
    ]
    cut = _like_pycocotools(tmp_path, split, dets)
    assert cut["coco"] and cut["recall40"]


def test_the_cap_of_100(tmp_path):
    """2**1024 as the 101st detection of its image: coco's cap drops it (nothing
    changes); recall40 has no cap and stops its fill on it."""
    split = _split(1, lambda i: [(1, 0), (1, 1)])
    dets = [_det(1, 1, 0, 0.9)] + [_det(1, 1, 2, 0.5, j / 100) for j in range(99)]
    dets.append(_det(1, 1, 1, -HUGE))
    assert _like_pycocotools(tmp_path, split, dets) == {"coco": False, "recall40": True}


POOL = st.sampled_from(
    [HUGE, -HUGE, HUGE + 1, HUGE + 2, -HUGE - 1, 0.9, 0.5, 1, 2**60, math.inf, -math.inf]
)


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    n_images=st.integers(1, 3),
    truth=st.lists(st.tuples(st.integers(1, 3), st.integers(1, 2), st.integers(0, 2)), max_size=5),
    dets=st.lists(
        st.tuples(st.integers(1, 3), st.integers(1, 2), st.integers(0, 2), POOL),
        min_size=1,
        max_size=10,
    ),
)
def test_random_files_score_like_pycocotools(tmp_path, n_images, truth, dets):
    """Random files of ±2**1024 (+ k), floats, float infinities, small and 2**60
    integers, tied and in any order, on images with and without ground truth of a
    class: equal to pycocotools 2.0.11 under coco and recall40."""
    split = _split(n_images, lambda i: [(c, s) for im, c, s in truth if im == i])
    _like_pycocotools(tmp_path, split, [_det(min(i, n_images), c, s, v) for i, c, s, v in dets])


def _paths_dets():
    dets = [_det(i, 1, i % 3, 0.1 * i) for i in range(1, 7)]
    dets += [_det(2, 1, 1, HUGE), _det(5, 1, 2, -HUGE), _det(4, 2, 1, HUGE + 1)]
    return dets + [_det(i, 2, 1, 0.5) for i in (1, 3, 4)]


def paths_agree(tmp_path, gt, dt):
    """Whole, cached, streamed-piece and cut-shard runs of the files give the same
    records (``det_overflow``, ``det_key``, the order) and scorecards under ``coco`` and
    ``recall40``; returns the whole load."""
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    cached = [load_predictions(dt, truth, cache_dir=str(tmp_path / "c")) for _ in range(2)]
    assert all(c.score_conflicts == whole.score_conflicts for c in cached)
    ranges = shards.plan(truth.n_images, 2)
    (tmp_path / "pieces").mkdir(exist_ok=True)
    streamed = stream_pieces(dt, truth, ranges, str(tmp_path / "pieces"))
    cut = list(shards.pieces(truth, whole, ranges))
    for protocol in ("coco", "recall40"):
        single = match(truth, whole, protocol)
        for source in ("streamed", "cut"):
            matched = []
            for path, piece in zip(streamed.paths, cut):
                loaded = shards.load_piece(path)
                assert loaded[2].score_conflicts == piece[2].score_conflicts
                piece = loaded if source == "streamed" else piece
                matched.append((shards.match_shard(*piece, protocol), piece[1]))
            merged = shards.merge(matched, truth.n_boxes)
            for name in ("det_overflow", "det_key", "det_order", "det_rank"):
                a, b = getattr(merged, name), getattr(single, name)
                assert (a is None and b is None) or a.tobytes() == b.tobytes(), name
            assert score_records(merged, protocol) == score_records(single, protocol)
        ours = evaluate(truth, whole, protocol)
        assert all(evaluate(truth, other, protocol) == ours for other in cached)
    return whole


def test_whole_streamed_sharded_and_cached_alike(tmp_path, monkeypatch):
    """The streamed pieces (tiny blocks), the shards of a whole load and cached loads
    carry the detections beyond float64's range (narrowed to each shard): every shard
    merges to the whole run's records (``det_overflow`` included) and the numbers
    equal the whole run's and pycocotools 2.0.11's."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 256)
    split = _split(6, lambda i: [(1, i % 3), (2, 1)])
    gt, dt = _write(tmp_path, split, _paths_dets())
    assert paths_agree(tmp_path, gt, dt).overflowing().sum() == 3
    _like_pycocotools(tmp_path, split, _paths_dets())


def _beyond_inputs(files, seed, n_images=10):
    """``test_exact_order_paths``' mixed file with class 5 holding ±2**1024 (+ k)
    among its floats."""
    rng, split, dets = _inputs(files, seed, n_images)
    for d in dets:
        if d["category_id"] == 5 and rng.random() < 0.5:
            d["score"] = int(rng.choice([1, -1])) * (HUGE + int(rng.integers(0, 3)))
    return rng, split, dets


@pytest.mark.parametrize("seed", [1, 2])
def test_the_mixed_file_scores_as_pycocotools(files, seed):
    """pycocotools 2.0.11 on the file: every summary number and per-class AP."""
    _, split, dets = _beyond_inputs(files, seed, 24)
    truth, predictions = _coco_equal(files, split, dets)
    assert predictions.overflowing().any()


@pytest.mark.parametrize("protocol", ["coco", "recall40"])
def test_weights_equal_duplicated_images(files, protocol):
    """A weight w scores as w adjacent copies of the image (the bootstrap's and the
    tag slices' mechanism): the copies of a huge score's detection stop the fill as on
    the duplicated file, itself checked against pycocotools 2.0.11 under coco."""
    rng, split, dets = _beyond_inputs(files, 3)
    weighted_equals_duplicated(files, rng, split, dets, protocol)


@pytest.mark.parametrize("protocol", ["coco", "recall40"])
def test_class_groups_give_the_whole_run(files, protocol, tmp_path):
    """The platform's path (image shards, class groups, their files, the records
    file): records field for field (``det_overflow`` included) and the scorecard bit
    for bit equal to the whole run."""
    _, split, dets = _beyond_inputs(files, 4, 24)
    truth, predictions = files.load(split, dets)
    whole, expected, result, _ = whole_and_grouped(truth, predictions, protocol, 7, 3, tmp_path)
    assert whole.det_overflow.any()
    assert json.dumps(result) == json.dumps(expected)


@pytest.mark.parametrize("protocol", ["coco", "recall40"])
def test_leave_one_out_is_the_headline_without_the_image(files, protocol):
    """Leave-one-out AP of the class holding the huge scores, per image, equals the
    headline with that image's weight 0 (the definition the engine states), the fill
    stops included; ``leave_one_out_metrics`` gives ``leave_one_out``'s values."""
    _, split, dets = _beyond_inputs(files, 5)
    truth, predictions = files.load(split, dets)
    records = match(truth, predictions, protocol)
    k = 4  # category id 5
    assert records.det_overflow[records.det_class == k].any()
    ap, without = leave_one_out(records, protocol, k)
    assert ap == headline(records, protocol)[1][k]
    for image in range(truth.n_images):
        w = np.ones(truth.n_images, np.int64)
        w[image] = 0
        expected = headline(records, protocol, weights=w)[1][k]
        assert without[image] == pytest.approx(expected, abs=1e-15, nan_ok=True), image
    metrics = leave_one_out_metrics(records, protocol, k, slots=[0])
    assert metrics[None][1].tobytes() == without.tobytes()
    slot_ap, slot_without = leave_one_out(records, protocol, k, slot=0)
    assert metrics[0][0] == slot_ap and metrics[0][1].tobytes() == slot_without.tobytes()


def test_the_cli_writes_strict_json(tmp_path):
    """The command line scores the file under coco (exit 0, AP equal to pycocotools
    2.0.11) and writes strict JSON: the infinite shown score is never a bare
    ``Infinity``."""
    split = _split(1, lambda i: [(1, 0)])
    gt, dt = _write(tmp_path, split, [_det(1, 1, 0, HUGE), _det(1, 1, 1, 0.5)])
    proc = subprocess.run(
        [sys.executable, "-m", "evaluation.engine", "score", "--truth", str(gt)]
        + ["--predictions", str(dt), "--protocol", "coco", "--format", "json"],
        capture_output=True,
        text=True,
    )
    assert proc.returncode == 0, proc.stderr

    def strict(token):
        raise ValueError(token)

    result = json.loads(proc.stdout, parse_constant=strict)
    assert result["summary"]["AP"] == pytest.approx(pycocotools_eval(gt, dt).stats[0], abs=1e-12)


def test_recall_zero_reads_a_detection_outside_the_size_range_too(tmp_path):
    """The class's first detection is a large false positive (ignored in the small
    range) of score 2**1024: pycocotools 2.0.11's ``dtScoresSorted`` holds it in every
    size range, so AP_small (small boxes found by floats) stops after recall 0 too."""
    split = _split(2, lambda i: [(1, 0)])
    dets = [
        {"image_id": 1, "category_id": 1, "bbox": [50, 50, 40, 40], "score": HUGE},
        _det(1, 1, 0, 0.9),
        _det(2, 1, 0, 0.8),
    ]
    gt, dt = _write(tmp_path, split, dets)
    small = pycocotools_eval(gt, dt).eval["precision"][0, :, 0, 1, 2]
    assert np.count_nonzero(small) == 1
    _like_pycocotools(tmp_path, split, dets)
