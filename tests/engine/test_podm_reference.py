"""All-point VOC AP without the pixel offset against object-detection-metrics 0.4.post1
(PyPI; module ``podm``, ``get_pascal_voc_metrics`` with ``AllPointsInterpolation``).

That package follows the VOC devkit's rule on continuous coordinates: detections of a
class sorted by score with Python's stable sort (ties keep file order), each takes its
single best-overlapping box of the image (first maximum), IoU >= 0.5 -> TP if free,
else FP; the area under the precision envelope. It knows no difficult or crowd boxes,
so the splits here have none. The engine runs the ``voc`` preset with ``pixel_offset``
0 (a custom protocol). (globox 2.9.0 also installs cleanly but offers only COCO-style
101-point AP, already covered by pycocotools.)
"""

import numpy as np
import podm.metrics as podm_metrics  # requirements-dev.txt pins it (and shapely, its import)
import pytest

from evaluation.engine import evaluate, protocol_from_dict

from .synthetic import make_detections, make_split

CONTINUOUS_VOC = protocol_from_dict({"name": "voc-continuous", "base": "voc", "pixel_offset": 0})


def _podm_ap(split, detections):
    def box(image, category, bbox, score=None):
        x, y, w, h = bbox
        return podm_metrics.BoundingBox.of_bbox(image, category, x, y, x + w, y + h, score)

    gold = [box(a["image_id"], a["category_id"], a["bbox"]) for a in split["annotations"]]
    preds = [box(d["image_id"], d["category_id"], d["bbox"], d["score"]) for d in detections]
    metrics = podm_metrics.get_pascal_voc_metrics(
        gold, preds, 0.5, podm_metrics.MethodAveragePrecision.AllPointsInterpolation
    )
    return {k: float(m.ap) for k, m in metrics.items() if m.num_groundtruth}


@pytest.mark.parametrize("seed", range(15))
def test_all_point_ap_equals_object_detection_metrics(files, seed):
    rng = np.random.default_rng(1000 + seed)
    split = make_split(
        rng,
        n_images=int(rng.integers(1, 10)),
        n_classes=int(rng.integers(1, 4)),
        boxes_per_image=float(rng.uniform(0.5, 6)),
        crowd_rate=0.0,
        integer_coords=bool(seed % 2),
        width=300,
        height=200,
    )
    detections = make_detections(
        rng,
        split,
        false_per_image=float(rng.uniform(0, 6)),
        duplicate_rate=0.4,
        score_levels=int(rng.choice([3, 1000])),  # many ties, in shuffled file order
    )
    truth, predictions = files.load(split, detections)
    ours = evaluate(truth, predictions, CONTINUOUS_VOC)["per_class"]
    expected = _podm_ap(split, detections)
    names = {c["id"]: c["name"] for c in split["categories"]}
    for category_id, ap in expected.items():
        assert ours[names[category_id]]["AP"] == pytest.approx(ap, abs=1e-12), names[category_id]
    for name, row in ours.items():
        if row["AP"] is not None:
            assert any(names[c] == name for c in expected), name
