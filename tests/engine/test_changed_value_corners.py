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

from evaluation.engine import COCO_SUMMARY_KEYS, evaluate, load_predictions, load_truth
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
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=st.data())
def test_cityscale_random_files_with_alias_boxes_equal_the_script(tmp_path, data):
    """Random boxes (heights, visibilities, ignore flags, categories 1 and 2) on image
    5, on the lost image 2^63 + 1 and on the unlisted 2^63 it is found under, and
    detections on the listed images: ``pedestrian_oracle.cityscale_script``'s miss
    rates for every setup (or its refusal)."""
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
    anns = [
        _city_ann(n + 1, i, x, h, c, vis_ratio=v, ignore=g)
        for n, (i, x, h, c, v, g) in enumerate(boxes)
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
