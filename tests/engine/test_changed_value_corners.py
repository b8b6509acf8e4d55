"""Three corners of the records under a changed value (``test_changed_value_aliases``).

pycocotools 2.0.11 (run in each test, ``conftest.pycocotools_eval``) and the CityPersons
script (its transliteration ``pedestrian_oracle.cityscale_coco``) look images and
categories up by the values ``list(np.unique(...))`` gives: where numpy changes a listed
id L into a value C no listed id has, the records of an unlisted id written with C are
found under L's entry. Here: the city-scale script's reading of such boxes, a repeated
annotation id on one (``loadAnns`` keeps the last annotation of an id), and integer
scores beyond 2^53 ranked in the entry pycocotools ranks them in. Files are invented.
"""

import json

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
)
from evaluation.engine.pedestrian import setup_counts

from . import pedestrian_oracle
from . import test_cityscale_raises as city
from .conftest import as_reference, pycocotools_eval

BIG = 2**53  # float64 holds 2^53 + 1 as 2^53


def _write(tmp_path, split, dets, name=""):
    gt, dt = tmp_path / f"gt{name}.json", tmp_path / f"dt{name}.json"
    gt.write_text(json.dumps(split))
    dt.write_text(json.dumps(dets))
    return gt, dt


def _equal_pycocotools(tmp_path, split, dets):
    """Every summary number and per-class AP of ``coco`` equal pycocotools 2.0.11's."""
    gt, dt = _write(tmp_path, split, dets)
    reference = pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    ours = evaluate(truth, load_predictions(dt, truth), "coco")
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    for k, name in enumerate(truth.classes):
        precision = reference.eval["precision"][:, :, k, 0, 2]
        expected = None if np.all(precision == -1) else pytest.approx(np.mean(precision))
        assert ours["per_class"][name]["AP"] == expected, name
    return ours, reference


def _box(image, category, x, n):
    return {"id": n, "image_id": image, "category_id": category, "iscrowd": 0} | {
        "bbox": [x, 100, 40, 40],
        "area": 1600,
    }


# -- 3. integer scores beyond 2^53 ------------------------------------------------------


def _det(image, category, x, score):
    return {"image_id": image, "category_id": category, "bbox": [x, 100, 40, 40], "score": score}


#: A lost category (2^53 + 1 beside 0.5: numpy's float64 makes it 2^53) whose entry finds
#: an annotation and two detections written 2^53: a false alarm scored 2^53.0 (first in
#: the file) and a hit scored 2^53 + 1. Alone, numpy types their list float64, where they
#: tie (file order: the false alarm first, AP 0.5); the category's own detection, scored
#: beyond uint64, would make the list exact objects (the hit first, AP 1) — pycocotools
#: never looks it up. Likewise a detection on an image whose id np.unique loses.
CASES = {
    "own detection of the lost category": (
        [{"id": 1, "width": 640, "height": 480}],
        [{"id": 0.5, "name": "a"}, {"id": BIG + 1, "name": "b"}],
        [_box(1, BIG, 100, 1)],
        [_det(1, BIG, 300, float(BIG)), _det(1, BIG, 100, BIG + 1), _det(1, BIG + 1, 9, 2**64 + 1)],
    ),
    "detection on a lost image": (
        [{"id": i, "width": 640, "height": 480} for i in (2**63 + 1, 5)],
        [{"id": 1, "name": "b"}],
        [_box(5, 1, 100, 1)],
        [_det(5, 1, 300, float(BIG)), _det(5, 1, 100, BIG + 1), _det(2**63 + 1, 1, 9, 2**64 + 1)],
    ),
}


@pytest.mark.parametrize("case", CASES)
def test_wide_integer_scores_are_ranked_in_the_entry_pycocotools_ranks_them_in(tmp_path, case):
    """pycocotools 2.0.11's AP 0.5 (the tie in float64), not the exact objects' 1.0; and
    no order conflict is recorded (so no refusal under another per-image cap)."""
    images, categories, anns, dets = CASES[case]
    split = {"images": images, "categories": categories, "annotations": anns}
    ours, reference = _equal_pycocotools(tmp_path, split, dets)
    assert reference.stats[0] == pytest.approx(0.5)
    truth = load_truth(tmp_path / "gt.json")
    conflicts = load_predictions(tmp_path / "dt.json", truth).score_conflicts or {}
    assert not any(conflicts.get(key) for key in ("100", "none"))


# -- 1. miss-rate-cityscale: the CityPersons script's _gts[C, 1] ----------------------

WIDE = 2**63  # images [2^63 + 1, 5]: numpy's float64 makes 2^63 + 1 into 2^63


def _city_case(extra):
    """Images 2^63 + 1 (lost: 2^63) and 5; on image 5 a box, a hit and a false alarm;
    ``extra``: annotations of the unlisted image 2^63 (category 1 unless given)."""
    anns = [_city_ann(1, 5, 10.0), *[_city_ann(n + 2, WIDE, *a) for n, a in enumerate(extra)]]
    dets = [city._det(10.0, score=0.9, image_id=5), city._det(900.0, score=0.5, image_id=5)]
    dets.append(city._det(300.0, score=0.7, image_id=WIDE + 1))  # the lost image's own
    return city._dataset(anns, images=(WIDE + 1, 5)), dets


def _city_ann(n, image, x, h=100.0, category=1, **keys):
    return city._ann(n, x, h=h, image_id=image, category_id=category, **keys)


@pytest.mark.parametrize(
    "extra",
    [
        [(300.0,), (600.0,)],  # two counted misses under the lost entry
        [(300.0, 60.0)],  # small only: the setups differ
        [(300.0, 100.0, 1, {"ignore": 1}), (600.0, 30.0)],  # an ignore box; `all` only
        [(300.0, 100.0, 1, {"vis_ratio": 0.3})],  # heavy
        [(300.0, 100.0, 2)],  # category 2: never accumulated
    ],
)
def test_cityscale_scores_an_image_alias_box_as_the_script(tmp_path, extra):
    """``pedestrian_oracle.cityscale_coco`` (the CityPersons script's ``_prepare``
    finds ``imgToAnns[2^63]``, ``evaluateImg`` reads ``_gts[2^63, 1]``): the miss
    rates of every setup, nine references each; the split page's counts too."""
    split, dets = _city_case([])
    for n, (x, *rest) in enumerate(extra):
        keys = rest.pop() if rest and isinstance(rest[-1], dict) else {}
        split["annotations"].append(_city_ann(n + 2, WIDE, x, *rest, **keys))
    gt, dt = city._write(tmp_path, split, dets)
    ours = city._agree(gt, dt)
    plain = {**split, "annotations": split["annotations"][:1]}
    if any(rest[1:2] != [2] for _, *rest in extra):  # category 1: the numbers move
        script = pedestrian_oracle.cityscale_script(split, dets)
        assert script != pedestrian_oracle.cityscale_script(plain, dets)
    counts = setup_counts(load_truth(gt), "miss-rate-cityscale")
    for setup, (mean_s, _) in zip(city.SETUPS, pedestrian_oracle.cityscale_script(split, dets)):
        assert (counts[setup]["c1"] > 0) == (mean_s != -1), setup
    assert ours["n_images"] == 2


@settings(
    max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=st.data())
def test_cityscale_random_files_with_alias_boxes_equal_the_script(tmp_path, data):
    """Random boxes (heights, visibilities, ignore flags, categories 1 and 2) on image
    5, on the lost image 2^63 + 1 and on the unlisted 2^63 it is found under, and
    detections on the listed images, annotation ids repeated at random (``loadAnns``
    keeps the last of an id): ``pedestrian_oracle.cityscale_script``'s miss rates for
    every setup (or its refusal)."""
    images = st.sampled_from([5, WIDE + 1, WIDE])
    box = st.tuples(
        images,
        st.sampled_from([10.0, 300.0, 600.0]),
        st.sampled_from([30.0, 60.0, 100.0]),
        st.sampled_from([1, 1, 2]),
        st.sampled_from([0.3, 1.0]),
        st.sampled_from([0, 0, 1]),
    )
    boxes = data.draw(st.lists(box, min_size=1, max_size=7))
    ids = data.draw(st.lists(st.integers(1, 5), min_size=len(boxes), max_size=len(boxes)))
    anns = [
        _city_ann(n, i, x, h, c, vis_ratio=v, ignore=g) for n, (i, x, h, c, v, g) in zip(ids, boxes)
    ]
    det = st.tuples(
        st.sampled_from([5, WIDE + 1]),
        st.sampled_from([10.0, 300.0, 900.0]),
        st.sampled_from([60.0, 100.0]),
        st.integers(1, 9),
    )
    dets = [
        city._det(x, h=h, score=s / 10, image_id=i)
        for i, x, h, s in data.draw(st.lists(det, min_size=1, max_size=6))
    ]
    gt, dt = city._write(
        tmp_path, city._dataset(anns, images=(WIDE + 1, 5), categories=(1, 2)), dets
    )
    city._agree(gt, dt)


# -- 2. a repeated annotation id on an alias annotation ---------------------------------

LOST_IMAGE = [{"id": i, "width": 640, "height": 480} for i in (2**63 + 1, 5)]
LOST_CATEGORY = [{"id": 0.5, "name": "a"}, {"id": BIG + 1, "name": "b"}]

#: ``(images, categories, annotations as (id, image, category, x))``: an alias annotation
#: (image 2^63 under the lost 2^63 + 1; category 2^53 under the lost 2^53 + 1) sharing
#: its id with an annotation of a listed entry, before or after it (``loadAnns`` keeps
#: the last: each fetched occurrence becomes a copy of it), or with a lost entry's own.
REPEATS = {
    "image alias last": (LOST_IMAGE, [{"id": 1, "name": "b"}], [(1, 5, 1, 10), (1, WIDE, 1, 300)]),
    "image alias first": (LOST_IMAGE, [{"id": 1, "name": "b"}], [(1, WIDE, 1, 300), (1, 5, 1, 10)]),
    "image alias and the lost image's own": (
        LOST_IMAGE,
        [{"id": 1, "name": "b"}],
        [(2, 5, 1, 10), (1, WIDE, 1, 300), (1, WIDE + 1, 1, 500)],
    ),
    "category alias last": (
        [{"id": 5, "width": 640, "height": 480}],
        LOST_CATEGORY,
        [(1, 5, 0.5, 10), (1, 5, BIG, 300)],
    ),
    "category alias first": (
        [{"id": 5, "width": 640, "height": 480}],
        LOST_CATEGORY,
        [(1, 5, BIG, 300), (1, 5, BIG + 1, 500), (1, 5, 0.5, 10)],
    ),
}


def _repeat_files(images, categories, anns):
    split = {
        "images": images,
        "categories": categories,
        "annotations": [_box(i, c, x, n) for n, i, c, x in anns],
    }
    dets = [  # a hit on each box of a listed image (loadRes takes no other)
        _det(i, c, x, 0.5 + x / 1e4) for _, i, c, x in anns if i != WIDE
    ]
    dets.append(_det(5, 1, 300, 0.4))  # on image 5 where the image alias box lies
    return split, dets


@pytest.mark.parametrize("case", REPEATS)
def test_a_repeated_id_on_an_alias_annotation_is_scored_as_pycocotools(tmp_path, case):
    """pycocotools 2.0.11 on the file (every summary number, per-class AP); the VOC
    reading reads it as the file whose alias annotation names an unrelated unlisted
    image or category (an unlisted id's annotation is never fetched: no copy of it,
    none made by it), as it treats repeated ids."""
    split, dets = _repeat_files(*REPEATS[case])
    _equal_pycocotools(tmp_path, split, dets)
    other = json.loads(json.dumps(split))
    for ann in other["annotations"]:
        if ann["image_id"] == WIDE:
            ann["image_id"] = 9
        if ann["category_id"] == BIG:
            ann["category_id"] = 4
    gt, dt = _write(tmp_path, other, dets, "-other")
    truth_other = load_truth(gt)
    truth = load_truth(tmp_path / "gt.json")
    for protocol in ("voc", "voc07"):
        ours = evaluate(truth, load_predictions(tmp_path / "dt.json", truth), protocol)
        theirs = evaluate(truth_other, load_predictions(dt, truth_other), protocol)
        assert ours["summary"] == theirs["summary"], protocol
        assert ours["per_class"] == theirs["per_class"], protocol


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=st.data())
def test_random_repeated_ids_beside_alias_annotations_equal_pycocotools(tmp_path, data):
    """Random annotations (ids from 1 to 4, so repeated) on listed, lost, unlisted and
    changed-value images and categories, detections on the listed images:
    pycocotools 2.0.11's numbers, per class too."""
    images = [{"id": i, "width": 640, "height": 480} for i in (2**63 + 1, 3, 5)]
    categories = [{"id": c, "name": f"k{n}"} for n, c in enumerate((0.5, BIG + 1, 2))]
    image_refs = st.sampled_from([2**63 + 1, 3, 5, WIDE, 9])
    category_refs = st.sampled_from([0.5, BIG + 1, 2, BIG, 4])
    ann = st.tuples(st.integers(1, 4), image_refs, category_refs, st.sampled_from([10, 300, 500]))
    anns = [(4, WIDE, 2, 10), (3, 3, BIG, 300)] + data.draw(st.lists(ann, max_size=8))
    det = st.tuples(st.sampled_from([3, 5]), category_refs, st.sampled_from([10, 300, 500]))
    dets = [
        _det(i, c, x + 1, 0.1 * (n + 1))
        for n, (i, c, x) in enumerate(data.draw(st.lists(det, min_size=1)))
    ]
    split = {
        "images": images,
        "categories": categories,
        "annotations": [_box(i, c, x, n) for n, i, c, x in anns],
    }
    _equal_pycocotools(tmp_path, split, dets)


@pytest.mark.parametrize("alias", [True, False])
def test_cityscale_boolean_scores_beside_an_alias_box(tmp_path, alias):
    """Boolean scores on image 5: the script's ``accumulate`` joins them with the empty
    float64 list of the lost image's entry where an alias box puts it in ``E``
    (scored), and raises on the boolean array without it (refused, naming the record):
    ``pedestrian_oracle.cityscale_script``; through a cached load too."""
    anns = [city._ann(1, 10.0, image_id=5)]
    if alias:
        anns.append(city._ann(2, 300.0, image_id=WIDE))
    dets = [city._det(10.0, score=True, image_id=5), city._det(900.0, score=False, image_id=5)]
    gt, dt = city._write(tmp_path, city._dataset(anns, images=(WIDE + 1, 5)), dets)
    script = city._script(gt, dt)
    assert isinstance(script, TypeError) != alias
    for cache in (None, tmp_path / "cache", tmp_path / "cache"):
        if alias:
            city._agree(gt, dt, cache=cache)
            continue
        with pytest.raises(InputError, match="TypeError") as error:
            city._ours(gt, dt, cache)
        assert (error.value.record, error.value.field) == ("record 0", "score")
