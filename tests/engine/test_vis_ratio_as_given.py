"""``vis_ratio="as-given"`` (the default since engine 2.14.0): an annotation's
``vis_ratio`` read exactly as the city-scale benchmark's ``eval_MR_multisetup.py``
reads it, under ``miss-rate-cityscale``.

Source: ``eval_MR_multisetup.py`` ``COCOeval._prepare`` (cvgroup-njust/CityPersons,
read from the published code): ``gt['ignore'] = 1 if (gt['height'] < HtRng[0] or
gt['height'] > HtRng[1]) or (gt['vis_ratio'] < VisRng[0] or gt['vis_ratio'] >
VisRng[1]) else gt['ignore']``. So any number enters the comparisons as it is — a
negative or > 1 value, an infinity, a NaN (every comparison with NaN is False in
Python, IEEE 754: the box is *not* out of range) — and a JSON boolean compares as 0 or
1 (Python's ``bool`` is an ``int``); null or text make Python 3 raise TypeError there.
The script never reads a ``visibility`` key. ``pedestrian_oracle.cityscale_coco`` is
that code transliterated; every worked case here compares with it on the very parsed
JSON the engine reads (Python's ``json`` reads ``NaN``/``Infinity``, as the script's
``json.load`` does). It never reads ``iscrowd`` either (``ignore`` only).
"""

import json
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.level_provenance import level_record
from evaluation.engine.pedestrian import evaluate_setups, setup_counts

from . import pedestrian_oracle
from .cityscale_checks import SETUPS, setups_as_script
from .cityscale_checks import write_files as _write


def _compare(tmp_path, dataset, results, **options):
    """Every setup's value and nine miss rates against the transliteration, exactly,
    on the file as written and read back by Python's json (as the script reads it)."""
    gt, dt = _write(tmp_path, dataset, results)
    parsed = json.loads(gt.read_text())
    truth = load_truth(gt, **options)
    return truth, setups_as_script(truth, dt, parsed, results)


def _person(ann_id, x, **keys):
    return {
        "id": ann_id,
        "image_id": 1,
        "category_id": 1,
        "bbox": [x, 0.0, 40.0, 100.0],
        "height": 100.0,
        "ignore": 0,
        **keys,
    }


def _scene(value, **more):
    """P1 carries the value under test; P2 (0.9) and P3 (0.3) are ordinary. Detections
    on P1 (0.9), P2 (0.8), P3 (0.7) and one on nothing (0.6)."""
    dataset = {
        "images": [{"id": 1, "width": 2048, "height": 1024}],
        "categories": [{"id": 1, "name": "pedestrian"}],
        "annotations": [
            _person(1, 0.0, vis_ratio=value, **more),
            _person(2, 100.0, vis_ratio=0.9),
            _person(3, 200.0, vis_ratio=0.3),
        ],
    }
    results = [
        {"image_id": 1, "category_id": 1, "bbox": [x, 0, 40, 100], "score": s}
        for x, s in ((0.0, 0.9), (100.0, 0.8), (200.0, 0.7), (900.0, 0.6))
    ]
    return dataset, results


# --- the oracle follows _prepare on the odd values ---------------------------------


def test_the_oracle_compares_any_number_as_the_script_and_raises_on_null_or_text():
    """_prepare's comparisons, by hand: NaN is in no way out of range (counted in
    reasonable and in heavy); ``false`` is 0 (< 0.2: out of every setup); ``true`` is
    1 (reasonable, not heavy); null and text raise TypeError (Python 3)."""
    counted = {}
    for label, value in (("nan", math.nan), ("false", False), ("true", True)):
        dataset, results = _scene(value)
        for setup in ("reasonable", "heavy"):
            _, mrs = pedestrian_oracle.cityscale_coco(
                dataset, results, pedestrian_oracle.SETUP_IDS[setup]
            )
            counted[label, setup] = mrs[0]
    # reasonable: P1 and P2 counted (or P2 alone), both found, one false positive
    assert counted["nan", "reasonable"] == 0.0 and counted["true", "reasonable"] == 0.0
    assert counted["nan", "heavy"] == 0.0  # P1 and P3 both found
    for value in (None, "0.5"):
        with pytest.raises(TypeError):
            pedestrian_oracle.cityscale_coco(*_scene(value), 0)


# --- worked cases against the oracle -----------------------------------------------


@pytest.mark.parametrize(
    "value, n_reasonable, n_heavy",
    [
        (-0.5, 1, 1),  # below every range: ignored
        (1.5, 2, 1),  # above 0.65, below the open end 1e10: reasonable
        (1e11, 1, 1),  # above the open end 1e10: ignored in every setup
        (math.nan, 2, 2),  # no comparison holds: counted everywhere
        (math.inf, 1, 1),
        (-math.inf, 1, 1),
        (False, 1, 1),  # 0
        (True, 2, 1),  # 1
        (0.65, 2, 2),  # closed ranges meet
    ],
)
def test_a_vis_ratio_is_read_as_given(tmp_path, value, n_reasonable, n_heavy):
    truth, ours = _compare(tmp_path, *_scene(value))
    got = ours["levels"]
    assert got["reasonable"]["classes"]["pedestrian"]["n_gt"] == n_reasonable
    assert got["heavy"]["classes"]["pedestrian"]["n_gt"] == n_heavy
    assert truth.box_counts["visibility_from_vis_ratio"] == 3
    assert truth.box_counts["unread_attributes"] == 0  # never left unread
    # the split page's counts per setup read the same column
    counts = setup_counts(truth, "miss-rate-cityscale")
    assert counts["reasonable"]["pedestrian"] == n_reasonable
    assert counts["heavy"]["pedestrian"] == n_heavy


def test_vis_ratio_wins_beside_a_visibility(tmp_path):
    """P1: vis_ratio 0.3 beside visibility 0.9. The script reads 0.3 (heavy, not
    reasonable); the ``read`` reading took 0.9 (reasonable). Counted as read from
    vis_ratio and as overriding a visibility."""
    truth, ours = _compare(tmp_path, *_scene(0.3, visibility=0.9))
    assert ours["levels"]["reasonable"]["classes"]["pedestrian"]["n_gt"] == 1
    assert ours["levels"]["heavy"]["classes"]["pedestrian"]["n_gt"] == 2
    assert truth.box_counts["visibility_from_vis_ratio"] == 3
    assert truth.box_counts["vis_ratio_beside_visibility"] == 1
    # and the other way round: a visibility of 0.3 beside vis_ratio 0.9 counts in reasonable
    truth, ours = _compare(tmp_path, *_scene(0.9, visibility=0.3))
    assert ours["levels"]["reasonable"]["classes"]["pedestrian"]["n_gt"] == 2
    old = load_truth(tmp_path / "gt.json", vis_ratio="read")
    before = evaluate_setups(
        old, load_predictions(tmp_path / "dt.json", old), "miss-rate-cityscale"
    )
    assert before["levels"]["reasonable"]["classes"]["pedestrian"]["n_gt"] == 1


@pytest.mark.parametrize("annotations", ["reference", "strict"])
@pytest.mark.parametrize("literal", ["null", '"0.5"', "[]", "{}"])
def test_null_or_text_is_refused_naming_record_and_field(tmp_path, annotations, literal):
    """The script raises on these (TypeError in ``_prepare``; the box's height 100
    lets the comparison run): refused, naming the annotation and the field — under
    ``reference`` by ``miss-rate-cityscale`` where the script compares it (engine
    2.15.8; ``test_cityscale_raises.py``), under ``strict`` on reading. Left unread
    (``read``) they were absent."""
    dataset, results = _scene("@")
    gt, dt = _write(tmp_path, dataset, results)
    gt.write_text(json.dumps(dataset).replace('"@"', literal))
    with pytest.raises(TypeError):  # the transliteration, on the file as Python reads it
        pedestrian_oracle.cityscale_script(json.loads(gt.read_text()), results)
    with pytest.raises(InputError) as e:
        truth = load_truth(gt, annotations=annotations)
        evaluate_setups(truth, load_predictions(dt, truth), "miss-rate-cityscale")
    assert e.value.record == "annotations[0]" and e.value.field == "vis_ratio"
    assert load_truth(gt, vis_ratio="read").n_boxes == 3


def test_a_bad_vis_ratio_the_script_never_sees_is_not_refused(tmp_path):
    """``_prepare`` reads only annotations of the listed images (``getAnnIds(imgIds=
    p.imgIds, ...)``): one of an unlisted image is left out (counted) with its null."""
    dataset, _ = _scene(0.5)
    dataset["annotations"].append(_person(9, 0.0, vis_ratio=None, image_id=77))
    truth = load_truth(_write(tmp_path, dataset))
    assert truth.n_boxes == 3


def test_numbers_with_literals_and_huge_integers_read_as_the_script(tmp_path):
    """``NaN``, ``Infinity``, ``-Infinity`` and an integer beyond float64 (Python
    compares the int exactly; here +inf, on the same side of every range limit)."""
    dataset, results = _scene("@1")
    dataset["annotations"][1]["vis_ratio"] = "@2"
    dataset["annotations"][2]["vis_ratio"] = "@3"
    gt, dt = _write(tmp_path, dataset, results)
    text = gt.read_text()
    for mark, literal in (("@1", "NaN"), ("@2", str(10**400)), ("@3", "-Infinity")):
        text = text.replace(f'"{mark}"', literal)
    gt.write_text(text)
    truth = load_truth(gt)
    np.testing.assert_array_equal(truth.vis_ratio, [math.nan, math.inf, -math.inf])
    parsed = json.loads(text)
    ours = evaluate_setups(truth, load_predictions(dt, truth), "miss-rate-cityscale")
    for setup in SETUPS:
        mean_s, mrs = pedestrian_oracle.cityscale_coco(
            parsed, results, pedestrian_oracle.SETUP_IDS[setup]
        )
        assert ours["levels"][setup]["miss_rate"] == (None if mrs is None else mean_s)


# --- the other protocols, hashes, cache ---------------------------------------------


def test_other_protocols_see_the_read_visibility(tmp_path):
    """The toolbox and Caltech readings (and KITTI levels) take the ``visibility``
    column, which ``as-given`` leaves as ``read`` gives it: their numbers do not move."""
    dataset, results = _scene(1.5, visibility=0.3)
    dataset["annotations"].append(_person(4, 300.0, vis_ratio=0.5))
    dataset["annotations"].append(_person(5, 400.0, vis_ratio=True))
    gt, dt = _write(tmp_path, dataset, results)
    new, old = load_truth(gt), load_truth(gt, vis_ratio="read")
    np.testing.assert_array_equal(new.visibility, old.visibility)
    np.testing.assert_array_equal(new.visibility, [0.3, 0.9, 0.3, 0.5, np.nan])
    for preset in ("miss-rate", "miss-rate-caltech"):
        a = evaluate_setups(new, load_predictions(dt, new), preset)
        b = evaluate_setups(old, load_predictions(dt, old), preset)
        assert a["levels"] == b["levels"], preset


def test_hashes_keep_apart_only_what_scores_differently(tmp_path):
    """A file without vis_ratio, or whose vis_ratio keys read the same under both
    readings, keeps the ``read`` hash; one where the script reads otherwise does not."""
    plain = _scene(0.5)[0]
    for ann in plain["annotations"]:
        del ann["vis_ratio"]
    same = _scene(0.5)[0]
    other = _scene(1.5)[0]
    for name, dataset, equal in (("p", plain, True), ("s", same, True), ("o", other, False)):
        gt = _write(tmp_path, dataset, name=f"{name}.json")
        a, b = load_truth(gt), load_truth(gt, vis_ratio="read")
        assert (a.content_hash() == b.content_hash()) is equal, name
    unread = load_truth(tmp_path / "p.json", vis_ratio="unread")
    assert unread.content_hash() == load_truth(tmp_path / "p.json").content_hash()


def test_the_cache_keeps_the_three_readings_apart(tmp_path):
    gt = _write(tmp_path, _scene(1.5, visibility=0.3)[0])
    cache = tmp_path / "cache"
    for reading in ("read", "as-given", "unread", "as-given", "read"):
        got = load_truth(gt, cache_dir=cache, vis_ratio=reading)
        fresh = load_truth(gt, vis_ratio=reading)
        assert got.content_hash() == fresh.content_hash(), reading
        assert got.box_counts == fresh.box_counts, reading
        if fresh.vis_ratio is None:
            assert got.vis_ratio is None
        else:
            np.testing.assert_array_equal(got.vis_ratio, fresh.vis_ratio)


def test_the_record_names_the_reading(tmp_path):
    truth, ours = _compare(tmp_path, *_scene(0.3, visibility=0.9))
    predictions = load_predictions(tmp_path / "dt.json", truth)
    record = level_record("miss-rate-cityscale", truth, predictions, ours)
    assert "vis_ratio key as given" in record["area_source"]["truth"]
    toolbox = evaluate_setups(truth, predictions, "miss-rate")
    record = level_record("miss-rate", truth, predictions, toolbox)
    assert "else its vis_ratio key within 0-1" in record["area_source"]["truth"]


# --- a fractional iscrowd under the city-scale reading ------------------------------


@pytest.mark.parametrize("iscrowd", [0.5, -0.5, "0"])
def test_a_fractional_iscrowd_leaves_the_box_regular(tmp_path, iscrowd):
    """The script never reads ``iscrowd`` (only ``ignore``): P1 with iscrowd 0.5 is a
    regular box, counted and found. pycocotools 2.0.11 ignores it (``_prepare``:
    truthy iscrowd), and so do the toolbox readings here (its ignore flag)."""
    dataset, results = _scene(0.9, iscrowd=iscrowd)
    truth, ours = _compare(tmp_path, dataset, results)
    assert ours["levels"]["reasonable"]["classes"]["pedestrian"]["n_gt"] == 2
    toolbox = evaluate_setups(truth, load_predictions(tmp_path / "dt.json", truth), "miss-rate")
    assert toolbox["levels"]["reasonable"]["classes"]["pedestrian"]["n_gt"] == 1


def test_a_csv_ignore_column_still_ignores_under_the_city_scale_reading(tmp_path):
    """A CSV ``ignore`` column is the script's ``ignore`` key (our mapping), not an
    iscrowd: the box stays an ignore box."""
    boxes = tmp_path / "boxes.csv"
    boxes.write_text(
        "image_id,label,x_min,y_min,x_max,y_max,ignore\n"
        "1,pedestrian,0,0,40,100,1\n1,pedestrian,100,0,140,100,0\n"
    )
    images = tmp_path / "images.csv"
    images.write_text("image_id\n1\n")
    truth = load_truth(boxes, images=images)
    assert not truth.iscrowd_fraction.any()
    assert setup_counts(truth, "miss-rate-cityscale")["reasonable"]["pedestrian"] == 1


# --- random values against the oracle ------------------------------------------------

_SPECIAL = [math.nan, math.inf, -math.inf, -1.0, 0.0, 0.2, 0.65, 1.0, 1.5, 1e10, 2e10]
_vis_ratio = st.one_of(
    st.sampled_from(_SPECIAL),
    st.booleans(),
    st.floats(-2.0, 3.0, allow_nan=False),
)


@st.composite
def _files(draw):
    annotations = []
    for k in range(draw(st.integers(1, 6))):
        h = draw(st.sampled_from([30.0, 60.0, 100.0]))
        ann = {
            "id": k + 1,
            "image_id": draw(st.sampled_from([1, 2])),
            "category_id": 1,
            "bbox": [k * 50.0, 0.0, 0.41 * h, h],
            "height": h,
            "ignore": draw(st.sampled_from([0, 0, 1])),
            "vis_ratio": draw(_vis_ratio),
        }
        if draw(st.booleans()):
            ann["visibility"] = draw(st.sampled_from([0.1, 0.5, 0.9]))
        annotations.append(ann)
    results = [
        {
            "image_id": a["image_id"],
            "category_id": 1,
            "bbox": a["bbox"],
            "score": draw(st.sampled_from([0.3, 0.6, 0.9])),
        }
        for a in annotations
        if draw(st.booleans())
    ]
    results.append({"image_id": 1, "category_id": 1, "bbox": [500, 0, 41, 100], "score": 0.5})
    dataset = {
        "images": [{"id": 1}, {"id": 2}],
        "categories": [{"id": 1, "name": "pedestrian"}],
        "annotations": annotations,
    }
    return dataset, results


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(files=_files())
def test_random_vis_ratio_values_equal_the_script(tmp_path, files):
    _compare(tmp_path, *files)
