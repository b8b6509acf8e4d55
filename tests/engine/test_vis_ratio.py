"""A ground-truth file in the city-scale benchmark's layout: annotations with
``height``, ``vis_ratio`` and ``ignore`` keys (no ``visibility``).

The benchmark's ``eval_MR_multisetup.py`` ``_prepare`` reads ``gt['vis_ratio']`` for
the visibility ranges (``Params.VisRng``); ``pedestrian_oracle.cityscale_coco`` is its
transliteration (written from the published code's logic). The engine reads such a file
as it is — no mapping of keys — and must give the script's numbers (random files,
hypothesis), and a worked example shows a heavily occluded person moving from the
reasonable setup to the heavy one. The reading of files frozen before the key was read
(``vis_ratio="unread"``) keeps their columns and content hash; the ``read`` reading
(engines 2.9-2.10) is pinned where its own rules are tested (the default ``as-given``:
test_vis_ratio_as_given.py).
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.level_provenance import level_record
from evaluation.engine.pedestrian import evaluate_setups

from . import pedestrian_oracle
from .cityscale_checks import setups_as_script
from .cityscale_checks import write_files as _write


def _compare(tmp_path, dataset, results):
    """Per setup: the engine's value and nine miss rates on the file as written against
    the transliteration's ``summarize`` on the same parsed JSON (exact equality)."""
    gt, dt = _write(tmp_path, dataset, results)
    return setups_as_script(load_truth(gt), dt, dataset, results)


def _person(ann_id, x, vis_ratio, **more):
    return {
        "id": ann_id,
        "image_id": 1,
        "category_id": 1,
        "bbox": [x, 0.0, 40.0, 100.0],
        "height": 100.0,
        "vis_ratio": vis_ratio,
        "ignore": 0,
        **more,
    }


# --- the oracle reads vis_ratio, as the script -------------------------------------


def test_the_oracle_reads_vis_ratio_and_never_visibility():
    """``_prepare`` (eval_MR_multisetup.py) compares ``gt['vis_ratio']`` with VisRng:
    a person of vis_ratio 0.3 beside ``visibility: 0.9`` is out of the reasonable range
    (0.65 up), so the only counted box is missed-free and its detection a hit — but in
    the heavy setup (0.2-0.65) it is the counted one. Without the key ``_prepare``
    raises KeyError."""
    dataset = {
        "images": [{"id": 1}],
        "categories": [{"id": 1, "name": "pedestrian"}],
        "annotations": [_person(1, 0.0, 0.3, visibility=0.9), _person(2, 100.0, 0.9)],
    }
    results = [{"image_id": 1, "category_id": 1, "bbox": [100.0, 0, 40, 100], "score": 0.9}]
    _, reasonable = pedestrian_oracle.cityscale_coco(dataset, results, 0)
    _, heavy = pedestrian_oracle.cityscale_coco(dataset, results, 2)
    assert reasonable == [0.0] * 9  # box 2 counted and found; box 1 ignored
    assert heavy == [1.0] * 9  # box 1 counted, never found (box 2's detection ignored)
    without = {**dataset, "annotations": [{**dataset["annotations"][1]}]}
    del without["annotations"][0]["vis_ratio"]
    with pytest.raises(KeyError):
        pedestrian_oracle.cityscale_coco(without, results, 0)


# --- a worked example --------------------------------------------------------------


def _worked_example():
    """One image, five people 100 px tall: P1 (vis_ratio 0.3, heavy), P2 (0.9), P3
    (1.0), P4 (0.5, heavy), P5 (1.0). Detections: on P2 0.9, on P1 0.8, on P5 0.7."""
    dataset = {
        "images": [{"id": 1, "width": 2048, "height": 1024}],
        "categories": [{"id": 1, "name": "pedestrian"}],
        "annotations": [
            _person(1, 0.0, 0.3),
            _person(2, 100.0, 0.9),
            _person(3, 200.0, 1.0),
            _person(4, 300.0, 0.5),
            _person(5, 400.0, 1.0),
        ],
    }
    results = [
        {"image_id": 1, "category_id": 1, "bbox": [100.0, 0, 40, 100], "score": 0.9},
        {"image_id": 1, "category_id": 1, "bbox": [0.0, 0, 40, 100], "score": 0.8},
        {"image_id": 1, "category_id": 1, "bbox": [400.0, 0, 40, 100], "score": 0.7},
    ]
    return dataset, results


def test_a_heavily_occluded_person_moves_from_reasonable_to_heavy(tmp_path):
    """By hand (worked example). Read with vis_ratio, reasonable (h >= 50, v >= 0.65)
    counts P2, P3, P5: n = 3; the detections on P2 and P5 are hits, the one on P1 meets
    an ignore box (intersection over its own area 1): ignored. No false positive, so
    every FPPI point reads recall 2/3: miss rate 1/3. Heavy (0.2 <= v <= 0.65) counts
    P1 and P4: n = 2; the detection on P1 hits, the others meet ignore boxes: miss rate
    1/2. Read without the key (the reading before it was read; every box fully
    visible) reasonable counts all five, three found: 2/5; heavy counts none: None."""
    dataset, results = _worked_example()
    ours = _compare(tmp_path, dataset, results)
    reasonable = ours["levels"]["reasonable"]["classes"]["pedestrian"]
    heavy = ours["levels"]["heavy"]["classes"]["pedestrian"]
    assert reasonable["n_gt"] == 3 and heavy["n_gt"] == 2
    assert reasonable["detections"]["ignored"] == 1
    assert ours["levels"]["reasonable"]["miss_rate"] == pytest.approx(1 / 3, rel=1e-12)
    assert ours["levels"]["heavy"]["miss_rate"] == pytest.approx(1 / 2, rel=1e-12)

    gt, dt = tmp_path / "gt.json", tmp_path / "dt.json"
    old = load_truth(gt, vis_ratio="unread")
    before = evaluate_setups(old, load_predictions(dt, old), "miss-rate-cityscale")
    assert before["levels"]["reasonable"]["classes"]["pedestrian"]["n_gt"] == 5
    assert before["levels"]["reasonable"]["miss_rate"] == pytest.approx(2 / 5, rel=1e-12)
    assert before["levels"]["heavy"]["miss_rate"] is None

    # the toolbox and Caltech readings take the same visibility column
    truth = load_truth(gt)
    for preset in ("miss-rate", "miss-rate-caltech"):
        out = evaluate_setups(truth, load_predictions(dt, truth), preset)
        assert out["levels"]["heavy"]["classes"]["pedestrian"]["n_gt"] == 2, preset
        assert out["levels"]["reasonable"]["classes"]["pedestrian"]["n_gt"] == 3, preset

    # where the visibility came from: counts, and the reading in the protocol record
    assert truth.box_counts["visibility_from_vis_ratio"] == 5
    assert truth.box_counts["vis_ratio_beside_visibility"] == 0
    record = level_record("miss-rate-cityscale", truth, load_predictions(dt, truth), ours)
    assert "vis_ratio key as given" in record["area_source"]["truth"]
    read = load_truth(gt, vis_ratio="read")
    record = level_record("miss-rate-cityscale", read, load_predictions(dt, read), ours)
    assert "else its vis_ratio key within 0-1" in record["area_source"]["truth"]
    record = level_record("miss-rate-cityscale", old, load_predictions(dt, old), before)
    assert "a vis_ratio key is not read" in record["area_source"]["truth"]
    assert "visibility_from_vis_ratio" not in old.box_counts


# --- random files in the city-scale layout -----------------------------------------

_coord = st.integers(0, 12).map(lambda v: v * 10.0)
_height = st.sampled_from([15.0, 20.0, 30.0, 40.0, 50.0, 60.0, 75.0, 80.0, 93.75])
#: The setups' limits (0.2, 0.65) and values either side of each.
_vis_ratio = st.sampled_from([0.0, 0.1, 0.2, 0.3, 0.5, 0.65, 0.7, 0.9, 1.0])
_ignore = st.sampled_from([0, 0, 0, 1])


@st.composite
def _files(draw):
    n_images = draw(st.integers(1, 4))
    image_ids = draw(
        st.lists(st.integers(1, 20), min_size=n_images, max_size=n_images, unique=True)
    )
    annotations = []
    for k in range(draw(st.integers(0, 4 * n_images))):
        h = draw(_height)
        annotations.append(
            {
                "id": k + 1,
                "image_id": draw(st.sampled_from(image_ids)),
                "category_id": 1,
                "bbox": [draw(_coord), draw(_coord), 0.41 * h, h],
                "height": h,
                "vis_ratio": draw(_vis_ratio),
                "ignore": draw(_ignore),
            }
        )
    results = []
    for image_id in image_ids:
        own = [a for a in annotations if a["image_id"] == image_id]
        for _ in range(draw(st.integers(0, 5))):
            if own and draw(st.booleans()):
                x, y, w, h = draw(st.sampled_from(own))["bbox"]
                box = [x + draw(st.sampled_from([0.0, 3.0, 12.0])), y, w, h]
            else:
                h = draw(_height)
                box = [draw(_coord), draw(_coord), 0.41 * h, h]
            score = draw(st.sampled_from([0.2, 0.5, 0.8, 0.9]))  # ties
            results.append({"image_id": image_id, "category_id": 1, "bbox": box, "score": score})
    dataset = {
        "images": [{"id": i, "width": 2048, "height": 1024} for i in image_ids],
        "categories": [{"id": 1, "name": "pedestrian"}],
        "annotations": annotations,
    }
    return dataset, results


@settings(
    max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(files=_files())
def test_files_with_vis_ratio_keys_equal_the_script(tmp_path, files):
    """Every setup's value and nine miss rates equal the transliteration's exactly, the
    engine reading the file as written (``vis_ratio``, no ``visibility``)."""
    dataset, results = files
    if not results:  # loadRes indexes anns[0]: the script cannot read an empty list
        return
    _compare(tmp_path, dataset, results)


# --- the reading: precedence, bad values, options, cache ---------------------------


def _split(*annotations):
    return {
        "images": [{"id": 1}],
        "categories": [{"id": 1, "name": "pedestrian"}],
        "annotations": [
            {"id": k + 1, "image_id": 1, "category_id": 1, "bbox": [10.0 * k, 0, 4, 10], **a}
            for k, a in enumerate(annotations)
        ],
    }


def test_visibility_wins_beside_vis_ratio_and_bad_values_are_left_unread(tmp_path):
    """The ``read`` reading (engines 2.9-2.10; ``as-given`` is tested in
    test_vis_ratio_as_given.py). Our rule (documented in DEVELOPERS.md): a readable ``visibility`` wins and the
    ``vis_ratio`` beside it is counted; a ``visibility`` left unread (out of 0-1 or of
    another type) is as if absent, so ``vis_ratio`` is read; a ``vis_ratio`` out of 0-1
    or of another type is left unread like a ``visibility`` would be (counted in
    ``unread_attributes``); a null is absent."""
    gt = _write(
        tmp_path,
        _split(
            {"vis_ratio": 0.3},
            {"vis_ratio": 0.3, "visibility": 0.8},
            {"vis_ratio": 0.3, "visibility": 1.5},
            {"vis_ratio": 0.3, "visibility": "high"},
            {"vis_ratio": 1.5},
            {"vis_ratio": "x"},
            {"vis_ratio": True},
            {"vis_ratio": None},
            {},
        ),
    )
    truth = load_truth(gt, vis_ratio="read")
    np.testing.assert_array_equal(
        truth.visibility, [0.3, 0.8, 0.3, 0.3, np.nan, np.nan, np.nan, np.nan, np.nan]
    )
    assert truth.box_counts["visibility_from_vis_ratio"] == 3
    assert truth.box_counts["vis_ratio_beside_visibility"] == 1
    assert truth.box_counts["unread_attributes"] == 5  # 1.5, "high"; 1.5, "x", true


@pytest.mark.parametrize(
    "value, message",
    [("1.5", "the visible fraction lies within 0-1, got 1.5"), ('"x"', "expected")],
)
def test_strict_refuses_a_bad_vis_ratio_naming_record_and_field(tmp_path, value, message):
    gt = tmp_path / "gt.json"
    text = json.dumps(_split({}, {"vis_ratio": 0.5}, {"vis_ratio": "@"}))
    gt.write_text(text.replace('"@"', value))
    with pytest.raises(InputError) as e:
        load_truth(gt, annotations="strict", vis_ratio="read")
    assert e.value.record == "annotations[2]" and e.value.field == "vis_ratio"
    assert message in e.value.message
    assert load_truth(gt, vis_ratio="unread", annotations="strict").n_boxes == 3


def test_the_unread_reading_keeps_the_columns_and_hash_of_before(tmp_path):
    """``vis_ratio="unread"``: the key is skipped, whatever it holds, so the file reads
    as the same file without it (the reading of engines before 2.9.0); the default
    reading changes the visibility column and so the content hash."""
    with_key = _split({"vis_ratio": 0.3}, {"vis_ratio": "x"}, {"vis_ratio": 0.7})
    without = _split({}, {}, {})
    a = load_truth(_write(tmp_path, with_key, name="a.json"), vis_ratio="unread")
    b = load_truth(_write(tmp_path, without, name="b.json"), vis_ratio="unread")
    assert a.content_hash() == b.content_hash()
    assert a.box_counts == b.box_counts
    assert "visibility_from_vis_ratio" not in a.box_counts
    read = load_truth(tmp_path / "a.json", vis_ratio="read")
    assert read.content_hash() != a.content_hash()
    with pytest.raises(InputError, match="unknown vis_ratio reading"):
        load_truth(tmp_path / "a.json", vis_ratio="yes")


def test_the_cache_keeps_the_two_readings_apart(tmp_path):
    """The reading is part of the cache key: a hit under one never answers the other
    (either order), and each equals an uncached load."""
    gt = _write(tmp_path, _split({"vis_ratio": 0.3}, {"vis_ratio": 0.9}))
    for order in (("read", "unread"), ("unread", "read")):
        cache = tmp_path / f"cache-{order[0]}"
        for reading in order + order:  # the second round from the cache
            got = load_truth(gt, cache_dir=cache, vis_ratio=reading)
            fresh = load_truth(gt, vis_ratio=reading)
            assert got.content_hash() == fresh.content_hash(), (order, reading)
            np.testing.assert_array_equal(got.visibility, fresh.visibility)
            assert got.box_counts == fresh.box_counts


def test_other_formats_carry_the_counts_as_zero(tmp_path):
    """Every format has the counts under the default reading (0 where the key cannot
    occur), so one split written in two formats gives one result."""
    boxes = tmp_path / "boxes.csv"
    boxes.write_text(
        "image_id,label,x_min,y_min,x_max,y_max,visibility\n1,pedestrian,0,0,4,10,0.3\n"
    )
    images = tmp_path / "images.csv"
    images.write_text("image_id\n1\n")
    truth = load_truth(boxes, images=images)
    assert truth.box_counts["visibility_from_vis_ratio"] == 0
    assert truth.box_counts["vis_ratio_beside_visibility"] == 0
    assert (
        "visibility_from_vis_ratio"
        not in load_truth(boxes, images=images, vis_ratio="unread").box_counts
    )


@pytest.mark.parametrize("reading, expected", [(None, 1 / 3), ("read", 1 / 3), ("unread", 2 / 5)])
def test_the_cli_reads_vis_ratio_by_default(tmp_path, capsys, reading, expected):
    """The worked example through ``python -m evaluation.engine score``: the reasonable
    headline 1/3 with the key read (the default), 2/5 with ``--vis-ratio unread``."""
    from evaluation.engine.__main__ import main

    gt, dt = _write(tmp_path, *_worked_example())
    args = ["score", "--truth", str(gt), "--predictions", str(dt)]
    args += ["--protocol", "miss-rate-cityscale", "--format", "json"]
    if reading:
        args += ["--vis-ratio", reading]
    assert main(args) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["headline"] == pytest.approx(expected, rel=1e-12)
    with pytest.raises(SystemExit) as e:  # argparse's usage error, no traceback
        main(args + ["--vis-ratio", "maybe"])
    assert e.value.code == 2
