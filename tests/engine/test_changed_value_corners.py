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

from evaluation.engine import COCO_SUMMARY_KEYS, evaluate, load_predictions, load_truth

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
