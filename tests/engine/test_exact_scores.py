"""Integer scores beyond 2**53 against pycocotools 2.0.11 (``loaders.exact_scores``).

pycocotools keeps a JSON integer score as a Python ``int``; numpy then ranks an image's
list exactly when it becomes an int64, uint64 or object array, and joins a class's
lists in the type they promote to. The engine ranks float64, where 2**60 and 2**60 + 1
tie. A file on which the two orders differ is refused under the COCO order, naming the
record; on every other file the numbers are pycocotools'. Both halves are checked here
against pycocotools 2.0.11 itself: its ``evalImgs`` give each image's ranking, and the
class ranking is taken from them with the three lines of ``COCOeval.accumulate`` that
make it (written from the published code's logic), on the file as written and on the
same file with every score written as the float64 the engine reads.
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
from evaluation.engine.scoring import score_records

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


def _score_or_refuse(tmp_path, split, dets):
    """Ours against pycocotools 2.0.11: equal numbers, or a refusal exactly where its
    ranking of the file differs from its ranking of the float64 scores."""
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
    try:
        ours = evaluate(truth, predictions, "coco")
    except InputError as e:
        assert differs, "refused a file pycocotools ranks as float64"
        assert e.field == "score" and e.record.startswith("record ")
        record = int(e.record.split()[1])
        assert str(dets[record]["score"]) in e.message
        return "refused"
    assert not differs, "scored a file pycocotools ranks otherwise"
    _numbers_equal(reference, ours, truth)
    return "scored"


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
def test_huge_integer_scores_score_like_pycocotools_or_are_refused(tmp_path, n_images, truth, dets):
    """Huge integers close together (2**60 + k, around 2**63 and 2**64, 10**30 + k),
    mixed with floats, small integers and booleans, tied and in any file order, on
    images with and without detections or ground truth of a class: every summary
    number and per-class AP equal pycocotools 2.0.11, or the file is refused — only
    when pycocotools ranks it otherwise than its float64 scores."""
    split = _split(n_images, lambda i: [(c, s) for im, c, s in truth if im == i])
    records = [_det(min(i, n_images), c, s, v, shift) for i, c, s, v, shift in dets]
    _score_or_refuse(tmp_path, split, records)


def test_tied_huge_integers_are_refused_and_ordered_floats_scored(tmp_path):
    """2**60 before 2**60 + 1 in one image: pycocotools ranks the later one first (an
    int64 list), float64 ties them in file order — refused, naming record 1. Written
    in descending order the rankings agree and the numbers are pycocotools'."""
    split = _split(1, lambda i: [(1, 0)])
    tied = [_det(1, 1, 1, B), _det(1, 1, 0, B + 1)]
    assert _score_or_refuse(tmp_path, split, tied) == "refused"
    assert _score_or_refuse(tmp_path, split, tied[::-1]) == "scored"


def test_results_given_as_masks_too(tmp_path):
    """A results file read as masks (RLE ``segmentation``, no ``bbox``; its second read
    is mask-aware): the same refusal, and the same numbers in descending order. The
    masks are encoded with pycocotools 2.0.11's own ``mask.encode``."""
    from pycocotools import mask

    def rle(x):
        pixels = np.zeros((100, 100), np.uint8, order="F")
        pixels[0:10, x : x + 10] = 1
        encoded = mask.encode(pixels)
        return {**encoded, "counts": encoded["counts"].decode()}

    split = _split(1, lambda i: [(1, 0)])
    tied = [
        {"image_id": 1, "category_id": 1, "segmentation": rle(20), "score": B},
        {"image_id": 1, "category_id": 1, "segmentation": rle(0), "score": B + 1},
    ]
    assert _score_or_refuse(tmp_path, split, tied) == "refused"
    assert _score_or_refuse(tmp_path, split, tied[::-1]) == "scored"


def test_an_image_without_detections_makes_the_class_float64(tmp_path):
    """Each image alone ranks its huge integers as it would as floats, but their class
    joins int64 lists: refused. Add an image with ground truth and no detection of the
    class: its empty list is float64, the class is joined as float64 (rounded, stable)
    and the file is scored — equal to pycocotools."""
    dets = [_det(1, 1, 0, B), _det(2, 1, 0, B + 1)]
    assert _score_or_refuse(tmp_path, _split(2, lambda i: [(1, 0)]), dets) == "refused"
    assert _score_or_refuse(tmp_path, _split(3, lambda i: [(1, 0)]), dets) == "scored"


def test_a_float_in_the_list_rounds_it(tmp_path):
    """A float among an image's scores makes numpy round the integers (float64): the
    same file as the refused one above, with one float more, is scored."""
    split = _split(1, lambda i: [(1, 0)])
    dets = [_det(1, 1, 1, B), _det(1, 1, 0, B + 1), _det(1, 1, 2, 0.5)]
    assert _score_or_refuse(tmp_path, split, dets) == "scored"


def _beyond_the_cap(tmp_path):
    split = _split(1, lambda i: [(1, 0)])
    top = [_det(1, 1, j % 3, 2**62 + 10**6 * (100 - j), j / 7) for j in range(100)]
    return _write(tmp_path, split, top + [_det(1, 1, 0, B), _det(1, 1, 0, B + 1)])


def test_a_difference_below_the_cap_of_100_leaves_coco_alone(tmp_path):
    """The two tied integers rank 101st and 102nd: pycocotools' ``coco`` never keeps
    them (equal numbers); ``recall40``, without a cap, ranks them and is refused; the
    VOC protocols read float64 (the devkit's MATLAB doubles) and score the file."""
    gt, dt = _beyond_the_cap(tmp_path)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    _numbers_equal(pycocotools_eval(gt, dt), evaluate(truth, predictions, "coco"), truth)
    with pytest.raises(InputError, match="record 101") as refused:
        evaluate(truth, predictions, "recall40")
    assert refused.value.field == "score"
    for name in ("voc", "voc07"):
        assert evaluate(truth, predictions, name)["summary"]


def test_custom_protocols_follow_their_tie_order(tmp_path):
    """A custom protocol under the COCO order with a cap that was not checked (10)
    takes the recorded conflict (conservative); one based on coco under the file order
    reads float64 and scores the file."""
    gt, dt = _beyond_the_cap(tmp_path)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    capped = protocol_from_dict({"name": "coco-10", "base": "coco", "max_detections": 10})
    with pytest.raises(InputError, match="record 101"):
        evaluate(truth, predictions, capped)
    in_file_order = protocol_from_dict({"name": "coco-file", "base": "coco", "tie_order": "file"})
    assert evaluate(truth, predictions, in_file_order)["summary"]


def _refused(predictions, truth, protocol="coco"):
    with pytest.raises(InputError) as e:
        evaluate(truth, predictions, protocol)
    return str(e.value)


@pytest.mark.parametrize("refused", [True, False])
def test_streamed_pieces_shards_and_cache_carry_the_check(tmp_path, monkeypatch, refused):
    """The streamed pieces (tiny blocks), the shards of a whole load and a cached load
    carry the same check as the whole file: each shard's match refuses with the whole
    file's message, or every shard matches and merges to the whole run's records."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 256)
    split = _split(6, lambda i: [(1, 0), (2, 1)])
    # class a: one huge integer per image, B + 1 on odd images (refused: pycocotools
    # joins them as int64 and ranks B + 1 first) or 1000 apart (float64 ranks them too)
    dets = [_det(i, 1, i % 3, B + (i % 2 if refused else -1000 * i), i / 3) for i in range(1, 7)]
    dets += [_det(i, 2, 1, 0.5) for i in range(1, 7, 2)]
    gt, dt = _write(tmp_path, split, dets)
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    assert bool(whole.score_conflicts["100"]) is refused
    cached = [load_predictions(dt, truth, cache_dir=str(tmp_path / "c")) for _ in range(2)]
    assert all(c.score_conflicts == whole.score_conflicts for c in cached)
    ranges = shards.plan(truth.n_images, 2)
    pieces_dir = tmp_path / "pieces"
    pieces_dir.mkdir()
    streamed = stream_pieces(dt, truth, ranges, str(pieces_dir))
    cut = list(shards.pieces(truth, whole, ranges))
    matched = []
    for path, (_, _, p, _) in zip(streamed.paths, cut):
        s_truth, s_box, s_pred, s_pos = shards.load_piece(path)
        assert s_pred.score_conflicts == p.score_conflicts == whole.score_conflicts
        if refused:
            for sliced in (s_pred, p):
                with pytest.raises(InputError) as e:
                    shards.match_shard(s_truth, s_box, sliced, s_pos, "coco")
                assert str(e.value) == _refused(whole, truth)
        else:
            matched.append((shards.match_shard(s_truth, s_box, s_pred, s_pos, "coco"), s_box))
    if not refused:
        merged = shards.merge(matched, truth.n_boxes)
        single = match(truth, whole, "coco")
        for name in ("det_order", "det_rank", "det_score", "det_class", "det_reason"):
            assert np.array_equal(getattr(merged, name), getattr(single, name)), name
        assert score_records(merged, "coco") == score_records(single, "coco")


def test_the_cli_names_the_record(tmp_path):
    """The command line refuses with exit 2 and one located line, no traceback."""
    gt, dt = _write(
        tmp_path, _split(1, lambda i: [(1, 0)]), [_det(1, 1, 1, B), _det(1, 1, 0, B + 1)]
    )
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
        ],
        capture_output=True,
        text=True,
    )
    assert proc.returncode == 2
    assert "record 1: field 'score': score 1152921504606846977" in proc.stderr
    assert "Traceback" not in proc.stderr
