"""Detections of images a split does not hold: refused by default, as pycocotools 2.0.11
refuses them (``COCO.loadRes`` asserts "Results do not correspond to current coco set");
with ``unknown_images="drop"`` (the platform uses it only to re-score a stored file on
a later revision of its split) they are left out and counted, and the numbers are those
of the same file without them — checked against pycocotools on the filtered file.
"""

import json

import numpy as np
import pytest

from evaluation.engine import COCO_SUMMARY_KEYS, InputError, evaluate, load_predictions, load_truth

from . import label_writers as write
from .conftest import as_reference, pycocotools_eval

# Revision 1 had images 1, 2 and 7; revision 2 removed image 7 (and relabelled nothing
# else). The stored detections still cover image 7. Power-of-two sizes keep YOLO exact.
IMAGES_REV1 = {1: (1024, 512), 2: (1024, 512), 7: (512, 256)}
IMAGES_REV2 = {1: (1024, 512), 2: (1024, 512)}
CLASSES = ["Car", "Cyclist", "Pedestrian"]
BOXES = [  # iscrowd and area for pycocotools, which reads both
    (i, c, b, {"iscrowd": 0, "area": b[2] * b[3]})
    for i, c, b in [
        (1, "Car", [100.0, 200.0, 150.0, 80.5]),
        (1, "Pedestrian", [700.5, 150.0, 30.0, 90.0]),
        (2, "Cyclist", [20.0, 40.0, 50.0, 100.0]),
        (2, "Car", [600.0, 300.0, 200.0, 120.0]),
    ]
]
DETECTIONS = [
    (1, "Car", [102.0, 198.0, 150.0, 82.0], 0.9),
    (7, "Car", [10.0, 10.0, 40.0, 40.0], 0.95),
    (1, "Pedestrian", [701.0, 152.0, 28.0, 88.0], 0.8),
    (7, "Pedestrian", [100.0, 100.0, 20.0, 50.0], 0.5),
    (2, "Cyclist", [25.0, 45.0, 50.0, 100.0], 0.7),
    (2, "Car", [590.0, 290.0, 210.0, 130.0], 0.85),
    (1, "Car", [10.0, 10.0, 40.0, 40.0], 0.6),
]
KEPT = [d for d in DETECTIONS if d[0] in IMAGES_REV2]


def _formats(root):
    """{format: (truth of revision 2, detections with image 7, detections without)}."""
    csv_boxes, table = write.csv(root / "csv", IMAGES_REV2, CLASSES, BOXES)
    truth_json = load_truth(write.coco(root / "truth.json", IMAGES_REV2, CLASSES, BOXES))
    truth_csv = load_truth(csv_boxes, images=table)
    return {
        "json": (
            truth_json,
            write.coco(root / "all.json", IMAGES_REV1, CLASSES, BOXES, detections=DETECTIONS),
            write.coco(root / "kept.json", IMAGES_REV2, CLASSES, BOXES, detections=KEPT),
        ),
        "csv": (
            truth_csv,
            write.csv(root / "all_csv", IMAGES_REV1, CLASSES, BOXES, detections=DETECTIONS),
            write.csv(root / "kept_csv", IMAGES_REV2, CLASSES, BOXES, detections=KEPT),
        ),
        "kitti": (
            truth_csv,
            write.kitti(root / "all_kitti", IMAGES_REV1, CLASSES, BOXES, detections=DETECTIONS),
            write.kitti(root / "kept_kitti", IMAGES_REV2, CLASSES, BOXES, detections=KEPT),
        ),
        "yolo": (
            truth_csv,
            write.yolo(root / "all_yolo", IMAGES_REV1, CLASSES, BOXES, detections=DETECTIONS),
            write.yolo(root / "kept_yolo", IMAGES_REV2, CLASSES, BOXES, detections=KEPT),
        ),
    }


@pytest.mark.parametrize("fmt", ["json", "csv", "kitti", "yolo"])
def test_unknown_images_are_refused_by_default(tmp_path, fmt):
    truth, with_unknown, _ = _formats(tmp_path)[fmt]
    with pytest.raises(InputError) as error:
        load_predictions(with_unknown, truth)
    assert "not in the split" in str(error.value)
    assert "7" in str(error.value)


@pytest.mark.parametrize("fmt", ["json", "csv", "kitti", "yolo"])
def test_dropped_images_score_as_the_file_without_them(tmp_path, fmt):
    """Bit for bit the numbers of the file with image 7's lines removed; two dropped,
    counted in the result; the default loader on the filtered file counts nothing."""
    truth, with_unknown, without = _formats(tmp_path)[fmt]
    dropped = load_predictions(with_unknown, truth, unknown_images="drop")
    plain = load_predictions(without, truth)
    assert dropped.dropped_images == 2 and len(dropped) == len(KEPT)
    np.testing.assert_array_equal(dropped.boxes, plain.boxes)
    for protocol in ("coco", "voc"):
        a = evaluate(truth, dropped, protocol)
        b = evaluate(truth, plain, protocol)
        assert a["counts"].pop("dropped_unknown_images") == 2
        assert "dropped_unknown_images" not in b["counts"]
        assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True), protocol


def test_dropped_images_agree_with_pycocotools_on_the_filtered_file(tmp_path):
    """pycocotools 2.0.11 refuses the whole file (its loadRes assertion) and scores the
    file without image 7's detections; ours with ``drop`` gives its 12 numbers."""
    truth, with_unknown, without = _formats(tmp_path)["json"]
    with pytest.raises(AssertionError):
        pycocotools_eval(tmp_path / "truth.json", with_unknown)
    reference = pycocotools_eval(tmp_path / "truth.json", without)
    ours = evaluate(truth, load_predictions(with_unknown, truth, unknown_images="drop"), "coco")
    assert len(reference.stats) == len(COCO_SUMMARY_KEYS) == 12
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key


def test_every_image_unknown_leaves_no_detection(tmp_path):
    truth, _, _ = _formats(tmp_path)["json"]
    only_seven = [d for d in DETECTIONS if d[0] == 7]
    path = write.coco(tmp_path / "seven.json", IMAGES_REV1, CLASSES, BOXES, detections=only_seven)
    predictions = load_predictions(path, truth, unknown_images="drop")
    assert len(predictions) == 0 and predictions.dropped_images == 2
    assert evaluate(truth, predictions, "coco")["summary"]["AP"] == 0.0


def test_a_bad_record_after_dropping_is_named_by_its_place_in_the_file(tmp_path):
    """Records are located in the file as written, not in the filtered list: under the
    ``reject`` box policy the box leaving the frame is record 2 (record 0 dropped)."""
    truth, _, _ = _formats(tmp_path)["json"]
    rows = [
        {"image_id": 7, "category_id": 1, "bbox": [1, 1, 2, 2], "score": 0.5},
        {"image_id": 1, "category_id": 1, "bbox": [1, 1, 2, 2], "score": 0.5},
        {"image_id": 1, "category_id": 1, "bbox": [1000, 1, 200, 2], "score": 0.5},
    ]
    path = tmp_path / "bad.json"
    path.write_text(json.dumps(rows))
    with pytest.raises(InputError) as error:
        load_predictions(path, truth, unknown_images="drop", boxes="reject")
    assert "record 2" in str(error.value)


def test_unknown_policy_name_is_refused(tmp_path):
    truth, with_unknown, _ = _formats(tmp_path)["json"]
    with pytest.raises(InputError) as error:
        load_predictions(with_unknown, truth, unknown_images="skip")
    assert "unknown image policy" in str(error.value)
