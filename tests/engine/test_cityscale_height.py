"""``miss-rate-cityscale`` compares an annotation's own ``height`` key with the setups'
height ranges, as the CityPersons script does (``GroundTruth.height_key``,
``cityscale_height``; red team audit10, F1).

Source: the CityPersons script eval_MR_multisetup.py, transliterated from its published
code's logic (``pedestrian_oracle.cityscale_coco``, run per setup 0..3 as
``eval_demo.py`` does by ``pedestrian_oracle.cityscale_script``):

* ``_prepare``: ``gt['ignore'] = 1 if (gt['height'] < HtRng[id_setup][0] or
  gt['height'] > HtRng[id_setup][1]) or (gt['vis_ratio'] < ...) else gt['ignore']``:
  the annotation's ``height`` key, whatever its ``bbox`` says, compared as Python
  compares it (an int or float as given, a bool as 0/1, NaN outside no range; null,
  text, arrays and objects raise TypeError — at the first test, so in the first setup);
* ``coco.py`` ``loadRes``: a detection's ``height`` is its ``bbox[3]``, whatever the
  results file holds (the expanded height filter reads that one).

An annotation without a ``height`` key, on which the script raises KeyError, is scored
with its ``bbox[3]`` (a documented deviation, checked against the script on the file
with that key written in). Other protocols never read the key.
"""

import json
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, annotate_levels, load_predictions, load_truth
from evaluation.engine.pedestrian import evaluate_setups
from evaluation.engine.shards import truth_slice

from . import pedestrian_oracle
from .cityscale_checks import setups_as_script
from .test_cityscale_raises import SETUPS, _agree, _ann, _dataset, _det, _script, _write

# --- the red team's case ---------------------------------------------------------------

RED_TEAM_GT = {
    "images": [{"id": 1, "width": 2048, "height": 1024}],
    "annotations": [
        {
            "id": 1,
            "image_id": 1,
            "category_id": 1,
            "bbox": [400, 100, 16, 40],
            "height": 60,
            "vis_ratio": 1.0,
            "ignore": 0,
            "iscrowd": 0,
        }
    ],
    "categories": [{"id": 1, "name": "pedestrian"}],
}
RED_TEAM_DT = [{"image_id": 1, "category_id": 1, "bbox": [400, 100, 16, 40], "score": 0.8}]


def test_the_red_team_case_reads_the_height_key(tmp_path):
    """One box of bbox h 40 with ``"height": 60`` and a detection on it. By hand: 60 lies
    in reasonable [50, 1e10], small [50, 75] and all [20, 1e10] with vis_ratio 1.0, not
    in heavy (v <= 0.65); the detection's height is its bbox[3] = 40 >= 50 / 1.25, so it
    is kept and matches (IoU 1): recall 1 at FPPI 0, every miss rate 0, and the script's
    log-average (no clamp) exp(mean(log 0)) = 0. The engine read bbox[3] = 40 before:
    reasonable and small held no counted box (None)."""
    gt, dt = _write(tmp_path, RED_TEAM_GT, RED_TEAM_DT)
    reference = _script(gt, dt)
    assert [mean_s for mean_s, _ in reference] == [0.0, 0.0, -1, 0.0]
    truth = load_truth(gt)
    ours = setups_as_script(truth, dt, json.loads(gt.read_text()), RED_TEAM_DT)
    got = {s: ours["levels"][s]["classes"]["pedestrian"] for s in SETUPS}
    assert {s: (r["miss_rate"], r["n_gt"]) for s, r in got.items()} == {
        "reasonable": (0.0, 1),
        "small": (0.0, 1),
        "heavy": (None, 0),
        "all": (0.0, 1),
    }
    assert truth.height_key.tolist() == [60.0]
    assert truth.boxes[:, 3].tolist() == [40.0]
    predictions = load_predictions(dt, truth)
    done = annotate_levels(dict(ours), "miss-rate-cityscale", truth, predictions)
    assert "height key as given" in done["protocol_record"]["area_source"]["truth"]


# --- values of every type --------------------------------------------------------------


@pytest.mark.parametrize(
    "literal",
    [
        "60",  # an int inside reasonable and small
        "60.0",
        "49.9",  # below reasonable / small / heavy, inside all
        "50",  # the closed lower end
        "75",  # small's closed upper end: inside
        "75.5",  # just above small
        "19",  # below every range
        "20",  # all's lower end
        "10000000000",  # 1e10: the open ends' closed bound
        "10000000001",  # just above it
        "true",  # 1: below every range
        "false",
        "NaN",  # outside no range (both comparisons false)
        "Infinity",
        "-1",
        str(10**400),  # an int beyond float64: above every range, as Python compares it
        "1e400",  # read as inf by Python's json
    ],
)
@pytest.mark.parametrize("box_h", [40.0, 100.0])
def test_a_height_of_each_type_is_compared_as_the_script_compares_it(tmp_path, literal, box_h):
    """Box 1 carries the height under test over a bbox of another h; box 2 (h 100) and
    box 3 (h 60) are ordinary; detections on each box (their bbox[3]) and one on
    nothing. Every setup equals the script's, exactly."""
    first = _ann(1, 0.0, h=box_h, height="@0")
    dataset = _dataset([first, _ann(2, 200.0), _ann(3, 400.0, h=60.0)])
    results = [_det(0.0, h=box_h), _det(200.0, score=0.8), _det(400.0, h=60.0, score=0.7)]
    results.append(_det(900.0, score=0.6))
    gt, dt = _write(tmp_path, dataset, results, [literal])
    assert not isinstance(_script(gt, dt), Exception)
    _agree(gt, dt)


def test_heights_crossing_every_range_with_detections_of_other_heights(tmp_path):
    """Heights on both sides of each bound, over boxes whose bbox[3] sits elsewhere, and
    detections whose own bbox[3] is filtered (or not) by the expanded range: the
    script's numbers in every setup."""
    heights = [19, 20, 49.9, 50, 60, 75, 75.5, 100, 30.0, 80]
    box_hs = [60.0, 100.0, 60.0, 30.0, 45.0, 100.0, 70.0, 40.0, 60.0, 70.0]
    annotations = [
        _ann(k + 1, 60.0 * k, h=h_box, height=h, vis_ratio=[1.0, 0.5, 0.3][k % 3])
        for k, (h, h_box) in enumerate(zip(heights, box_hs))
    ]
    results = [
        _det(60.0 * k, h=h_box, score=round(1.0 - 0.05 * k, 2))
        for k, h_box in enumerate(box_hs)
        if k % 4 != 3
    ]
    results += [_det(900.0, h=h, score=0.33) for h in (30.0, 39.0, 95.0)]
    gt, dt = _write(tmp_path, _dataset(annotations), results)
    _agree(gt, dt)


def test_a_missing_height_key_takes_the_box_h(tmp_path):
    """Documented deviation: the script raises KeyError on an annotation without a
    ``height`` key; the engine takes its bbox[3] there, so the file scores as the
    script scores it with ``height`` = bbox[3] written in (the other annotation keeps
    its own, differing, height)."""
    plain = {k: v for k, v in _ann(1, 0.0, h=60.0).items() if k != "height"}
    own = _ann(2, 300.0, h=40.0, height=60.0)
    results = [_det(0.0, h=60.0), _det(300.0, h=40.0, score=0.8)]
    gt, dt = _write(tmp_path, _dataset([plain, own]), results)
    with pytest.raises(KeyError):
        pedestrian_oracle.cityscale_script(json.loads(gt.read_text()), results)
    written = _dataset([{**plain, "height": 60.0}, own])
    truth = load_truth(gt)
    assert truth.height_key.tolist() == [60.0, 60.0]
    ours = evaluate_setups(truth, load_predictions(dt, truth), "miss-rate-cityscale")
    for setup in SETUPS:
        mean_s, mrs = pedestrian_oracle.cityscale_coco(
            written, results, pedestrian_oracle.SETUP_IDS[setup]
        )
        level = ours["levels"][setup]
        assert level["miss_rate"] == (None if mrs is None else mean_s), setup


def test_without_any_height_key_the_box_h_is_read(tmp_path):
    """No annotation gives the key: no column (``height_key`` None), heights bbox[3]."""
    plain = {k: v for k, v in _ann(1, 0.0, h=60.0).items() if k != "height"}
    gt, _ = _write(tmp_path, _dataset([plain]), [_det(0.0)])
    truth = load_truth(gt)
    assert truth.height_key is None
    assert truth.cityscale_height().tolist() == [60.0]


# --- a height the script cannot compare ------------------------------------------------


@pytest.mark.parametrize("literal", ["null", '"60"', "[60]", "{}", '""'])
@pytest.mark.parametrize("box_h", [10.0, 60.0])
def test_a_height_the_script_cannot_compare_is_refused_naming_it(tmp_path, literal, box_h):
    """The height test is ``_prepare``'s first, so TypeError in the first setup
    whatever the box's h (10 px too, below every range)."""
    dataset = _dataset([_ann(1, 0.0), _ann(2, 300.0, h=box_h, height="@0")])
    gt, dt = _write(tmp_path, dataset, [_det(0.0)], [literal])
    assert isinstance(_script(gt, dt), TypeError)
    error = _agree(gt, dt, "annotations[1]", "height")
    assert "height" in error.message and "city-scale script" in error.message


@pytest.mark.parametrize("annotations", ["reference", "strict"])
def test_other_protocols_never_read_the_height_key(tmp_path, annotations):
    """The toolbox reading (``miss-rate``) and pycocotools' (``coco``) score a file with
    text and differing heights exactly as the file without the key (the toolbox reads
    the box's h: common practice of its bbGt boxes); under ``strict`` the key is not
    refused on reading either — only ``miss-rate-cityscale`` refuses it."""
    with_keys = _dataset(
        [_ann(1, 0.0, height="tall"), _ann(2, 300.0, h=40.0, height=60), _ann(3, 600.0)]
    )
    without = _dataset(
        [{k: v for k, v in a.items() if k != "height"} for a in with_keys["annotations"]]
    )
    results = [_det(0.0), _det(300.0, h=40.0, score=0.8), _det(600.0, score=0.5)]
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    gt_a, dt_a = _write(tmp_path / "a", with_keys, results)
    gt_b, dt_b = _write(tmp_path / "b", without, results)
    truth_a = load_truth(gt_a, annotations=annotations)
    truth_b = load_truth(gt_b, annotations=annotations)
    for protocol in ("miss-rate", "miss-rate-caltech"):
        a = evaluate_setups(truth_a, load_predictions(dt_a, truth_a), protocol)
        b = evaluate_setups(truth_b, load_predictions(dt_b, truth_b), protocol)
        assert a["levels"] == b["levels"], protocol
    from evaluation.engine import evaluate

    a = evaluate(truth_a, load_predictions(dt_a, truth_a), "coco")
    b = evaluate(truth_b, load_predictions(dt_b, truth_b), "coco")
    assert a["summary"] == b["summary"]
    with pytest.raises(InputError) as e:
        evaluate_setups(truth_a, load_predictions(dt_a, truth_a), "miss-rate-cityscale")
    assert (e.value.record, e.value.field) == ("annotations[0]", "height")


def test_the_first_value_in_prepares_order_is_named(tmp_path):
    """``_prepare`` walks image by image in sorted id order: image 1's null vis_ratio
    (its height 60 lets the test through) comes before image 2's text height; with
    image 1's box below every range its vis_ratio is never compared, and the height
    is named. A box holding both raises on its height (the first test)."""
    bad_height = _ann(1, 0.0, image_id=2, height="x")
    bad_vis = _ann(2, 300.0, image_id=1, height=60.0, vis_ratio=None)
    gt, dt = _write(tmp_path, _dataset([bad_height, bad_vis], images=(1, 2)), [_det(0.0)])
    _agree(gt, dt, "annotations[1]", "vis_ratio")
    (tmp_path / "b").mkdir()
    low = {**bad_vis, "height": 10.0}
    gt, dt = _write(tmp_path / "b", _dataset([bad_height, low], images=(1, 2)), [_det(0.0)])
    _agree(gt, dt, "annotations[0]", "height")
    (tmp_path / "c").mkdir()
    both = _ann(1, 0.0, height=None, vis_ratio=None)
    gt, dt = _write(tmp_path / "c", _dataset([_ann(2, 300.0), both]), [_det(0.0)])
    _agree(gt, dt, "annotations[1]", "height")


def test_a_height_is_raised_before_an_int_ignore_of_an_earlier_box(tmp_path):
    """``evaluate`` runs ``_prepare`` (every annotation) before ``evaluateImg``, whose
    ``computeIoU`` raises on ``int(NaN)``: the later box's text height is named."""
    nan_ignore = _ann(1, 0.0, ignore="@0")
    bad_height = _ann(2, 300.0, image_id=2, height="x")
    dataset = _dataset([nan_ignore, bad_height], images=(1, 2))
    gt, dt = _write(tmp_path, dataset, [_det(0.0)], ["NaN"])
    _agree(gt, dt, "annotations[1]", "height")


@pytest.mark.parametrize("height", [60, "x"])
def test_heights_read_on_the_loose_path(tmp_path, height):
    """A slice holding a value of another type in a field pycocotools never reads (an
    ``occlusion`` of text, left unread) is decoded again loosely: the heights are read
    there as on the typed path (the script never reads ``occlusion``)."""
    odd = _ann(1, 0.0, h=40.0, height=height, occlusion="partial")
    dataset = _dataset([odd, _ann(2, 300.0), _ann(3, 600.0, h=40.0, height=60.0)])
    results = [_det(0.0, h=40.0), _det(300.0, score=0.8), _det(600.0, h=40.0, score=0.7)]
    gt, dt = _write(tmp_path, dataset, results)
    assert load_truth(gt).box_counts["unread_attributes"] == 1
    _agree(gt, dt, *(("annotations[0]", "height") if height == "x" else ()))


def test_a_bad_height_on_an_unlisted_image_is_never_read(tmp_path):
    """``getAnnIds(imgIds=...)`` fetches the listed images' annotations only: one of an
    unlisted image is never compared, so the file scores (that annotation left out)."""
    dataset = _dataset([_ann(1, 0.0), _ann(2, 300.0, image_id=7, height=None)])
    gt, dt = _write(tmp_path, dataset, [_det(0.0)])
    assert not isinstance(_script(gt, dt), Exception)
    _agree(gt, dt)


# --- random files ----------------------------------------------------------------------

_BOX_H = st.sampled_from([10.0, 19.0, 30.0, 40.0, 48.0, 55.0, 60.0, 74.0, 90.0, 150.0])
_OTHER_HEIGHT = st.sampled_from(
    [19, 20, 40, 49, 50, 60, 75, 76, 100, 19.5, 49.9, 50.0, 62.5, 75.0, 75.5, 93.75, 200.0]
)


@st.composite
def _files(draw):
    image_ids = draw(st.lists(st.integers(1, 9), min_size=1, max_size=3, unique=True))
    annotations, results = [], []
    for k in range(draw(st.integers(1, 8))):
        h = draw(_BOX_H)
        ann = _ann(
            k + 1,
            draw(st.sampled_from([0.0, 100.0, 200.0, 300.0])),
            h=h,
            image_id=draw(st.sampled_from(image_ids)),
            category_id=draw(st.sampled_from([1, 1, 1, 2])),
            vis_ratio=draw(st.sampled_from([1.0, 0.9, 0.65, 0.5, 0.2, 0.1])),
            ignore=draw(st.sampled_from([0, 0, 0, 1])),
        )
        which = draw(st.integers(0, 9))
        if which < 3:  # ~30%: a height other than bbox[3], of either type
            ann["height"] = draw(_OTHER_HEIGHT)
        elif which == 3:  # the same value written as an int, or the box's h as given
            ann["height"] = int(h) if h == int(h) else h
        annotations.append(ann)
        for _ in range(draw(st.integers(0, 2))):  # detections on it, of its own bbox[3]
            det_h = h * draw(st.sampled_from([1.0, 1.0, 0.9, 1.1]))
            shift = draw(st.sampled_from([0.0, 2.0, 10.0]))
            results.append(
                _det(
                    ann["bbox"][0] + shift,
                    h=det_h,
                    score=draw(st.sampled_from([0.2, 0.4, 0.6, 0.8])),
                    image_id=ann["image_id"],
                )
            )
    for image_id in image_ids:  # false positives of every height
        for _ in range(draw(st.integers(0, 2))):
            results.append(
                _det(
                    800.0,
                    h=draw(_BOX_H),
                    score=draw(st.sampled_from([0.3, 0.7])),
                    image_id=image_id,
                )
            )
    if not results:  # loadRes indexes anns[0]: the script cannot read an empty list
        results.append(_det(900.0, image_id=image_ids[0]))
    order = draw(st.permutations(range(len(results))))
    return _dataset(annotations, images=image_ids, categories=(1, 2)), [results[i] for i in order]


@settings(
    max_examples=250, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(files=_files())
def test_random_files_with_own_heights_equal_the_script(tmp_path, files):
    """About 30% of the heights differ from bbox[3] (ints and floats, on both sides of
    every setup's bounds): every setup's value and nine miss rates equal the
    transliteration's exactly, through the cache too."""
    dataset, results = files
    gt, dt = _write(tmp_path, dataset, results)
    cache = tmp_path / "cache"
    _agree(gt, dt)
    _agree(gt, dt, cache=cache)
    _agree(gt, dt, cache=cache)  # from the cache


# --- cache, slices, hash ---------------------------------------------------------------


def test_the_cache_and_a_truth_slice_keep_the_heights(tmp_path):
    dataset = _dataset(
        [
            _ann(1, 0.0, h=40.0, height=60),
            _ann(2, 300.0, image_id=2),
            _ann(3, 600.0, image_id=2, h=100.0, height=float("nan")),
        ],
        images=(1, 2),
    )
    gt, _ = _write(tmp_path, dataset, [])
    whole = load_truth(gt)
    load_truth(gt, cache_dir=tmp_path / "c")
    cached = load_truth(gt, cache_dir=tmp_path / "c")
    np.testing.assert_array_equal(cached.height_key, whole.height_key)
    assert cached.content_hash() == whole.content_hash()
    assert whole.height_key[:2].tolist() == [60.0, 100.0] and math.isnan(whole.height_key[2])
    sliced, box_index = truth_slice(whole, 1, 2)
    assert box_index.tolist() == [1, 2]
    np.testing.assert_array_equal(sliced.height_key, whole.height_key[box_index])
    assert sliced.cityscale_height()[0] == 100.0


def _hash(root, annotations, **options):
    root.mkdir()
    gt, _ = _write(root, _dataset(annotations), [])
    return load_truth(gt, **options).content_hash()


def test_the_hash_changes_only_where_a_height_differs_from_the_box(tmp_path):
    """A split's fingerprint (common practice: a hash of what decides its numbers)
    changes only where the key changes them: heights equal to bbox[3] (an int for a
    float too), a height the script cannot compare (refused, scored as before by the
    others) and a height under the ``read`` reading (not read) keep the hash without
    the key; a differing height changes it, also from a split whose vis_ratio column
    holds the same numbers."""
    plain = [{k: v for k, v in _ann(1, 0.0, h=60.0).items() if k != "height"}]
    base = _hash(tmp_path / "a", plain)
    assert _hash(tmp_path / "b", [{**plain[0], "height": 60}]) == base
    assert _hash(tmp_path / "c", [{**plain[0], "height": "60"}]) == base
    differs = [{**plain[0], "height": 0.5}]
    assert _hash(tmp_path / "d", differs, vis_ratio="read") == _hash(
        tmp_path / "e", plain, vis_ratio="read"
    )
    assert _hash(tmp_path / "f", differs) != base
    # a vis_ratio (0.5) that differs from the visibility (0.9) beside it, against a
    # height (0.5) that differs from bbox[3]: one extra column of the same value each
    seen = {k: v for k, v in plain[0].items() if k != "vis_ratio"}
    seen["visibility"] = 0.9
    as_vis = [{**seen, "vis_ratio": 0.5}]
    as_height = [{**seen, "height": 0.5}]
    assert _hash(tmp_path / "g", as_vis) != _hash(tmp_path / "h", as_height)


def test_a_split_frozen_before_keeps_its_hash_under_its_scheme(tmp_path):
    """``content_hash.HASH_SCHEMES``: the ``height`` keys enter the hash under the
    ``heights`` scheme (and ``repeats``, the default, new splits) only; a split frozen under ``named``
    before engine 2.18.2 read them verifies against the hash it was frozen with."""
    plain = [{k: v for k, v in _ann(1, 0.0, h=60.0).items() if k != "height"}]
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    gt_plain, _ = _write(tmp_path / "a", _dataset(plain), [])
    gt_height, _ = _write(tmp_path / "b", _dataset([{**plain[0], "height": 0.5}]), [])
    before, now = load_truth(gt_plain), load_truth(gt_height)
    assert now.content_hash("named") == before.content_hash("named") == before.content_hash()
    assert now.content_hash() == now.content_hash("heights") != before.content_hash()
