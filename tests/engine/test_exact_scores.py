"""Integer scores beyond 2**53 against pycocotools 2.0.11 (``loaders.exact_scores``).

pycocotools keeps a JSON integer score as a Python ``int``; numpy then ranks an image's
list exactly when it becomes an int64, uint64 or object array, and joins a class's
lists in the type they promote to. The engine ranks float64, where 2**60 and 2**60 + 1
tie. Where the two orders differ, the engine takes pycocotools' order (replayed when
the file is read) under ``coco`` and ``recall40``: every file is scored as pycocotools
2.0.11 scores it. Checked here against pycocotools 2.0.11 itself: every summary number
and per-class AP, each image's ranking (its ``evalImgs``' ``dtIds``) and each class's
accumulation order, taken from them with the three lines of ``COCOeval.accumulate``
that make it (written from the published code's logic); the same file with every
score written as the float64 the engine reads tells whether the exact order was
needed at all.
"""

import contextlib
import io
import json
import math
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import (
    COCO_SUMMARY_KEYS,
    InputError,
    evaluate,
    load_predictions,
    load_truth,
    match,
    shards,
)
from evaluation.engine.loaders import results_stream
from evaluation.engine.pieces import stream_pieces
from evaluation.engine.protocols import protocol_from_dict
from evaluation.engine.scorecard import score_records

from .conftest import as_reference, pycocotools_eval

B = 2**60
SPOTS = ([0, 0, 10, 10], [20, 0, 10, 10], [40, 0, 10, 10])


def _split(n_images, truth_of):
    annotations = []
    for image in range(1, n_images + 1):
        for cls, spot in truth_of(image):
            annotations.append(
                {
                    "id": len(annotations) + 1,
                    "image_id": image,
                    "category_id": cls,
                    "bbox": SPOTS[spot],
                    "area": 100.0,
                    "iscrowd": 0,
                }
            )
    return {
        "images": [{"id": i, "width": 100, "height": 100} for i in range(1, n_images + 1)],
        "categories": [{"id": 1, "name": "a"}, {"id": 2, "name": "b"}],
        "annotations": annotations,
    }


def _det(image, cls, spot, score, shift=0.0):
    x, y, w, h = SPOTS[spot]
    return {"image_id": image, "category_id": cls, "bbox": [x + shift, y, w, h], "score": score}


def _as_float(value):
    try:
        return float(value)
    except OverflowError:  # what the engine reads an integer beyond float64 as
        return math.inf if value > 0 else -math.inf


def _write(tmp_path, split, dets, name="dt.json"):
    gt, dt = tmp_path / "gt.json", tmp_path / name
    gt.write_text(json.dumps(split))
    dt.write_text(json.dumps(dets))
    return gt, dt


def _reference_orders(evaluator):
    """Each (image, class)'s ranked detection ids (``evaluateImg``'s ``dtIds``) and each
    class's accumulation order, as ``COCOeval.accumulate`` makes it from them:
    ``np.concatenate([e['dtScores'][0:maxDet] for e in E])``, then
    ``np.argsort(-dtScores, kind='mergesort')`` (None where numpy refuses: booleans)."""
    p = evaluator.params
    maxdet = p.maxDets[-1]
    images, classes = {}, {}
    for e in evaluator.evalImgs:
        if e is None or e["aRng"] != p.areaRng[0]:
            continue
        images[e["image_id"], e["category_id"]] = e["dtIds"]
        classes.setdefault(e["category_id"], []).append(e)
    for cat, E in classes.items():
        try:
            with np.errstate(all="ignore"):
                scores = np.concatenate([e["dtScores"][0:maxdet] for e in E])
                inds = np.argsort(-scores, kind="mergesort")
        except TypeError:
            classes[cat] = None
            continue
        ids = np.concatenate([e["dtIds"][0:maxdet] for e in E]).astype(np.int64)
        classes[cat] = ids[inds].tolist()
    return images, classes


def _numbers_equal(reference, ours, truth):
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    precision = reference.eval["precision"]
    for k, name in enumerate(truth.classes):
        cls_precision = precision[:, :, k, 0, 2]
        row = ours["per_class"][name]
        if np.all(cls_precision == -1):
            assert row["AP"] is None, name
            continue
        assert row["AP"] == pytest.approx(np.mean(cls_precision), abs=1e-12), name
        assert row["AP50"] == pytest.approx(np.mean(cls_precision[0]), abs=1e-12), name


def _orders_equal(reference, records, truth, cap=100):
    """Our per-(image, class) ranking and per-class accumulation order, as annotation
    ids (``loadRes`` numbers results from 1 in file order), equal pycocotools'."""
    images, classes = _reference_orders(reference)
    ids = records.det_order.astype(np.int64) + 1
    for cat, expected in classes.items():
        if expected is None:
            continue
        k = truth.classes.index({1: "a", 2: "b"}[cat])
        assert ids[records.det_class == k].tolist() == expected, ("class", cat)
    for (image, cat), expected in images.items():
        k = truth.classes.index({1: "a", 2: "b"}[cat])
        mine = (records.det_class == k) & (truth.image_ids[records.det_image] == image)
        ranked = ids[mine][np.argsort(records.det_rank[mine], kind="stable")]
        assert ranked.tolist() == list(expected)[:cap], ("image", image, cat)


def _score_like_reference(tmp_path, split, dets):
    """Ours against pycocotools 2.0.11 under ``coco``: equal numbers and orders.
    Returns whether its order of the file differs from its order of the float64
    scores ("exact") or not ("float64"), or that the reference raises."""
    gt, dt = _write(tmp_path, split, dets)
    floats = [{**d, "score": _as_float(d["score"])} for d in dets]
    _, dt_float = _write(tmp_path, split, floats, "dt-float.json")
    try:
        reference = pycocotools_eval(gt, dt)
    except TypeError:  # a class of booleans only: numpy cannot negate it
        return "the reference raises"
    as_floats = pycocotools_eval(gt, dt_float)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    differs = _reference_orders(reference) != _reference_orders(as_floats)
    _numbers_equal(reference, evaluate(truth, predictions, "coco"), truth)
    _orders_equal(reference, match(truth, predictions, "coco"), truth)
    return "exact" if differs else "float64"


def pycocotools_recall40(gt_path, dt_path):
    """pycocotools 2.0.11 ``COCOeval`` with ``recall40``'s settings: IoU 0.5, the 40
    recall points k/40, no per-image cap (maxDets far above any image's count)."""
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO(str(gt_path))
        evaluator = COCOeval(gt, gt.loadRes(str(dt_path)), "bbox")
        evaluator.params.iouThrs = np.array([0.5])
        evaluator.params.recThrs = np.array([k / 40 for k in range(1, 41)])
        evaluator.params.maxDets = [10**9]
        evaluator.evaluate()
        evaluator.accumulate()
    return evaluator


def _recall40_like_reference(tmp_path, split, dets):
    """Ours under ``recall40`` against ``pycocotools_recall40``: every class's AP and
    the mean, the per-image and per-class orders."""
    gt, dt = _write(tmp_path, split, dets)
    reference = pycocotools_recall40(gt, dt)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    ours = evaluate(truth, predictions, "recall40")
    precision = reference.eval["precision"][0, :, :, 0, 0]
    present = []
    for k, name in enumerate(truth.classes):
        if np.all(precision[:, k] == -1):
            assert ours["per_class"][name]["AP"] is None, name
            continue
        present.append(np.mean(precision[:, k]))
        assert ours["per_class"][name]["AP"] == pytest.approx(present[-1], abs=1e-12), name
    mean = np.mean(present) if present else -1.0  # pycocotools' -1: no class present
    assert as_reference(ours["summary"]["AP"]) == pytest.approx(mean, abs=1e-12)
    _orders_equal(reference, match(truth, predictions, "recall40"), truth, cap=None)


POOL = st.one_of(
    st.builds(
        lambda base, k: base + k,
        st.sampled_from([B, 2**63, -(2**63), 2**64, 10**30]),
        st.integers(-3, 3),
    ),
    st.sampled_from([0.5, float(B), 0.25, 1, 0, True, False, 2.0**64]),
)


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    n_images=st.integers(1, 4),
    truth=st.lists(st.tuples(st.integers(1, 4), st.integers(1, 2), st.integers(0, 2)), max_size=6),
    dets=st.lists(
        st.tuples(
            st.integers(1, 4),
            st.integers(1, 2),
            st.integers(0, 2),
            POOL,
            st.sampled_from([0.0, 1.0, 3.0]),
        ),
        min_size=1,
        max_size=12,
    ),
)
def test_huge_integer_scores_score_like_pycocotools(tmp_path, n_images, truth, dets):
    """Huge integers close together (2**60 + k, around 2**63 and 2**64, 10**30 + k),
    mixed with floats, small integers and booleans, tied and in any file order, on
    images with and without detections or ground truth of a class: every summary
    number, per-class AP and order equal pycocotools 2.0.11's under ``coco``, and its
    AP and orders under ``recall40``'s settings (where pycocotools scores the file)."""
    split = _split(n_images, lambda i: [(c, s) for im, c, s in truth if im == i])
    records = [_det(min(i, n_images), c, s, v, shift) for i, c, s, v, shift in dets]
    if _score_like_reference(tmp_path, split, records) != "the reference raises":
        _recall40_like_reference(tmp_path, split, records)


def test_tied_huge_integers_are_ranked_exactly(tmp_path):
    """2**60 before 2**60 + 1 in one image: pycocotools ranks the later one first (an
    int64 list), float64 ties them in file order; the engine takes pycocotools' order
    (the later detection matches the box: AP 1, not 0.5). Written in descending order
    the rankings agree anyway."""
    split = _split(1, lambda i: [(1, 0)])
    tied = [_det(1, 1, 1, B), _det(1, 1, 0, B + 1)]
    assert _score_like_reference(tmp_path, split, tied) == "exact"
    assert _score_like_reference(tmp_path, split, tied[::-1]) == "float64"
    _recall40_like_reference(tmp_path, split, tied)


def test_results_given_as_masks_too(tmp_path):
    """A results file read as masks (RLE ``segmentation``, no ``bbox``; its second read
    is mask-aware): ranked exactly too. The masks are encoded with pycocotools
    2.0.11's own ``mask.encode``; the reference is its ``segm`` evaluation."""
    from pycocotools import mask
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    def rle(x):
        pixels = np.zeros((100, 100), np.uint8, order="F")
        pixels[0:10, x : x + 10] = 1
        encoded = mask.encode(pixels)
        return {**encoded, "counts": encoded["counts"].decode()}

    split = _split(1, lambda i: [(1, 0)])
    for ann in split["annotations"]:
        x, y, w, h = ann["bbox"]
        ann["segmentation"] = [[x, y, x + w, y, x + w, y + h, x, y + h]]
    tied = [
        {"image_id": 1, "category_id": 1, "segmentation": rle(20), "score": B},
        {"image_id": 1, "category_id": 1, "segmentation": rle(0), "score": B + 1},
    ]
    gt, dt = _write(tmp_path, split, tied)
    with contextlib.redirect_stdout(io.StringIO()):
        coco = COCO(str(gt))
        reference = COCOeval(coco, coco.loadRes(str(dt)), "segm")
        reference.evaluate()
        reference.accumulate()
        reference.summarize()
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    assert predictions.score_conflicts["100"]  # the exact order is taken
    ours = evaluate(truth, predictions, "coco")
    assert ours["per_class"]["a"]["AP"] == pytest.approx(reference.stats[0], abs=1e-12)
    assert ours["summary"]["AP"] == pytest.approx(reference.stats[0], abs=1e-12)


def test_an_image_without_detections_makes_the_class_float64(tmp_path):
    """Each image alone ranks its huge integers as it would as floats, but their class
    joins int64 lists: B + 1 (image 2) before B (image 1), exact. Add an image with
    ground truth and no detection of the class: its empty list is float64, the class
    is joined as float64 (rounded, stable: image order). Both equal pycocotools."""
    dets = [_det(1, 1, 0, B), _det(2, 1, 1, B + 1)]
    assert _score_like_reference(tmp_path, _split(2, lambda i: [(1, 0)]), dets) == "exact"
    assert _score_like_reference(tmp_path, _split(3, lambda i: [(1, 0)]), dets) == "float64"


def test_a_float_in_the_list_rounds_it(tmp_path):
    """A float among an image's scores makes numpy round the integers (float64)."""
    split = _split(1, lambda i: [(1, 0)])
    dets = [_det(1, 1, 1, B), _det(1, 1, 0, B + 1), _det(1, 1, 2, 0.5)]
    assert _score_like_reference(tmp_path, split, dets) == "float64"


def test_exact_within_an_image_and_float64_over_the_class(tmp_path):
    """Image 1 ranks B + 1 (second in the file) before B exactly (an int64 list);
    image 2's float makes the class float64, where the two tie and keep image 1's
    order: the class order is neither float64's nor a sort by exact value."""
    split = _split(2, lambda i: [(1, 0)])
    dets = [_det(1, 1, 1, B), _det(1, 1, 0, B + 1), _det(2, 1, 0, 0.5), _det(2, 1, 2, 2.0**61)]
    assert _score_like_reference(tmp_path, split, dets) == "exact"
    _recall40_like_reference(tmp_path, split, dets)


def test_int64_negation_wraps_around_in_accumulate(tmp_path):
    """-2**63 is an image's lowest score (its list ``[-v ...]`` is exact), but
    ``accumulate`` negates the joined int64 array and -(-2**63) wraps to -2**63: the
    class ranks it first. Per image it is matched last (pycocotools 2.0.11)."""
    split = _split(2, lambda i: [(1, 0), (1, 1)])
    dets = [
        _det(1, 1, 0, -(2**63)),
        _det(1, 1, 1, 5),
        _det(2, 1, 0, 7),
        _det(2, 1, 2, -(2**63) + 1),
    ]
    assert _score_like_reference(tmp_path, split, dets) == "exact"
    _recall40_like_reference(tmp_path, split, dets)


def test_uint64_and_objects_beyond_2_64(tmp_path):
    """Scores in [2**63, 2**64) make uint64 lists (negation wraps, order kept); one
    beyond 2**64 makes an object array of exact Python ints: ties of float64 broken."""
    split = _split(3, lambda i: [(1, 0), (1, 1), (2, 2)])
    dets = [
        _det(1, 1, 0, 2**63 + 1),
        _det(1, 1, 1, 2**63 + 2),
        _det(2, 1, 0, 2**63 + 3),
        _det(2, 2, 2, 2**64 + 1),
        _det(3, 2, 2, 2**64 + 2),
        _det(3, 2, 1, 10**30),
        _det(3, 1, 1, 2**63),
    ]
    assert _score_like_reference(tmp_path, split, dets) == "exact"
    _recall40_like_reference(tmp_path, split, dets)


def _beyond_the_cap(tmp_path):
    split = _split(1, lambda i: [(1, 0)])
    top = [_det(1, 1, j % 3, 2**62 + 10**6 * (100 - j), j / 7) for j in range(100)]
    return _write(tmp_path, split, top + [_det(1, 1, 0, B), _det(1, 1, 0, B + 1)])


def test_the_cap_of_100_per_image(tmp_path):
    """The two tied integers rank 101st and 102nd: pycocotools' ``coco`` never keeps
    them; ``recall40``, without a cap, ranks them exactly (B + 1 first). Both equal
    pycocotools; the VOC protocols read float64 (the devkit's MATLAB doubles)."""
    gt, dt = _beyond_the_cap(tmp_path)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    assert not predictions.score_conflicts["100"] and predictions.score_conflicts["none"]
    _numbers_equal(pycocotools_eval(gt, dt), evaluate(truth, predictions, "coco"), truth)
    dets = json.loads(dt.read_text())
    _recall40_like_reference(tmp_path, json.loads(gt.read_text()), dets)
    for name in ("voc", "voc07"):
        assert evaluate(truth, predictions, name)["summary"]


def test_the_cap_decides_what_is_ranked(tmp_path):
    """101 detections on one image, one of them -2**63: the cap of 100 drops it, so
    ``coco``'s class order follows the others; without a cap it wraps to the top."""
    split = _split(2, lambda i: [(1, 0), (1, 1)])
    dets = [_det(1, 1, j % 3, B + j, j / 9) for j in range(100)]
    dets += [_det(1, 1, 0, -(2**63)), _det(2, 1, 1, B + 7), _det(2, 1, 0, B + 7)]
    assert _score_like_reference(tmp_path, split, dets) == "exact"
    _recall40_like_reference(tmp_path, split, dets)


def test_custom_protocols_follow_their_tie_order(tmp_path):
    """A custom protocol under the COCO order with a cap that was not replayed (10)
    takes the recorded conflict (conservative: a clear error naming the record); one
    based on coco under the file order reads float64 and scores the file."""
    gt, dt = _beyond_the_cap(tmp_path)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    capped = protocol_from_dict({"name": "coco-10", "base": "coco", "max_detections": 10})
    with pytest.raises(InputError, match="record 101") as refused:
        evaluate(truth, predictions, capped)
    assert refused.value.field == "score"
    assert "caps 100 and none only" in str(refused.value)
    in_file_order = protocol_from_dict({"name": "coco-file", "base": "coco", "tie_order": "file"})
    assert evaluate(truth, predictions, in_file_order)["summary"]


@pytest.mark.parametrize("exact", [True, False])
def test_streamed_pieces_shards_and_cache_carry_the_order(tmp_path, monkeypatch, exact):
    """The streamed pieces (tiny blocks), the shards of a whole load and a cached load
    carry the same order as the whole file (narrowed to each shard's detections):
    every shard matches and merges to the whole run's records, field for field, and
    the numbers equal the whole run's and pycocotools 2.0.11's."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 256)
    split = _split(6, lambda i: [(1, 0), (2, 1)])
    # class a: one huge integer per image, B + 1 on odd images (pycocotools joins them
    # as int64 and ranks B + 1 first) or 1000 apart (float64 ranks them too); class b
    # ties of distinct big integers within images
    dets = [_det(i, 1, i % 3, B + (i % 2 if exact else -1000 * i), i / 3) for i in range(1, 7)]
    dets += [_det(i, 2, 1, 0.5) for i in range(1, 7, 2)]
    dets += [_det(i, 2, j, B + (j if exact else 4096 * j)) for i in (2, 4) for j in (0, 2)]
    gt, dt = _write(tmp_path, split, dets)
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    assert bool(whole.score_conflicts["100"]) is exact
    cached = [load_predictions(dt, truth, cache_dir=str(tmp_path / "c")) for _ in range(2)]
    assert all(c.score_conflicts == whole.score_conflicts for c in cached)
    ranges = shards.plan(truth.n_images, 2)
    pieces_dir = tmp_path / "pieces"
    pieces_dir.mkdir()
    streamed = stream_pieces(dt, truth, ranges, str(pieces_dir))
    cut = list(shards.pieces(truth, whole, ranges))
    single = match(truth, whole, "coco")
    assert (single.det_key is not None) is exact
    for source in ("streamed", "cut"):
        matched = []
        for path, (c_truth, c_box, c_pred, c_pos) in zip(streamed.paths, cut):
            s_truth, s_box, s_pred, s_pos = shards.load_piece(path)
            assert s_pred.score_conflicts == c_pred.score_conflicts
            if source == "cut":
                s_truth, s_box, s_pred, s_pos = c_truth, c_box, c_pred, c_pos
            matched.append((shards.match_shard(s_truth, s_box, s_pred, s_pos, "coco"), s_box))
        merged = shards.merge(matched, truth.n_boxes)
        for name in ("det_order", "det_rank", "det_score", "det_class", "det_reason", "det_key"):
            a, b = getattr(merged, name), getattr(single, name)
            assert (a is None and b is None) or a.tobytes() == b.tobytes(), name
        assert score_records(merged, "coco") == score_records(single, "coco")
    ours = evaluate(truth, whole, "coco")
    for other in cached:
        assert evaluate(truth, other, "coco") == ours
    _numbers_equal(pycocotools_eval(gt, dt), ours, truth)


def test_the_cli_scores_the_file(tmp_path):
    """The command line scores such a file as pycocotools 2.0.11 does (exit 0)."""
    split = _split(1, lambda i: [(1, 0)])
    gt, dt = _write(tmp_path, split, [_det(1, 1, 1, B), _det(1, 1, 0, B + 1)])
    proc = subprocess.run(
        [
            sys.executable,
            "-m",
            "evaluation.engine",
            "score",
            "--truth",
            str(gt),
            "--predictions",
            str(dt),
            "--format",
            "json",
        ],
        capture_output=True,
        text=True,
    )
    assert proc.returncode == 0, proc.stderr
    result = json.loads(proc.stdout)
    assert result["summary"]["AP"] == pytest.approx(pycocotools_eval(gt, dt).stats[0], abs=1e-12)
