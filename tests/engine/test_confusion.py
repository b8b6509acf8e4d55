"""Confusion matrix at a score threshold: totals equal the per-class TP / FP / missed
counts of ``operating_point.counts_at`` at the same threshold (common practice: column =
predicted class, row = true class, background row and column)."""

import json

import numpy as np
import pytest

from evaluation.engine import PRESETS, load_predictions, load_truth, match
from evaluation.engine.confusion import cell_members, class_thresholds, confusion_matrix
from evaluation.engine.curves import cumulative_counts
from evaluation.engine.operating_point import counts_at

from .synthetic import make_detections, make_split
from .test_tide import WORKED_DETECTIONS, WORKED_SPLIT


def _records(tmp_path, split, detections, protocol):
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = load_truth(tmp_path / "gt.json")
    return match(truth, load_predictions(tmp_path / "dt.json", truth), protocol)


def test_worked_case(tmp_path):
    # Person detections d1..d6 scored 0.9 ... 0.4 (test_tide's worked case): at 0.55,
    # d1 (tp on A), d2 (localisation), d3 (duplicate), d4 (class error on car E) count.
    records = _records(tmp_path, WORKED_SPLIT, WORKED_DETECTIONS, "coco")
    result = confusion_matrix(records, 0.55)
    assert result["labels"] == ["person", "car", "background"]
    assert result["counts"] == [
        # person col: d1; bg col: B, C, D missed (d6 on C is below 0.55)
        [1, 0, 3],
        # car row: d4 (a person detection on the car) and the car itself missed
        [1, 0, 1],
        # background row: d2 and d3
        [2, 0, 0],
    ]
    assert result["row_normalised"][0] == [0.25, 0.0, 0.75]
    members = cell_members(records, 0.55, 1, 0)
    assert records.det_score[members["detections"]].tolist() == [0.6]
    assert cell_members(records, 0.55, 0, 2)["boxes"].tolist() == [1, 2, 3]


@pytest.mark.parametrize("protocol", ["coco", "voc", "recall40"])
@pytest.mark.parametrize("seed", range(3))
def test_totals_equal_counts_at_the_threshold(tmp_path, protocol, seed):
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=30, n_classes=4)
    detections = make_detections(rng, split, score_levels=20)  # ties at the threshold
    records = _records(tmp_path, split, detections, protocol)
    thresholds = class_thresholds(records, 0.5, {"class2": 0.3})
    counts = np.array(confusion_matrix(records, thresholds)["counts"])
    curves = cumulative_counts(records, max_detections=PRESETS[protocol].max_detections_limit)
    k = len(records.classes)
    for c in range(k):
        tp, fp = counts_at(*curves.segment(c), thresholds[c])
        assert counts[c, c] == tp
        assert counts[:, c].sum() == tp + fp
        assert counts[c, k] == curves.n_pos[c] - tp  # missed at this threshold
    assert counts[k, k] == 0


def test_unknown_class_threshold_is_refused(tmp_path):
    records = _records(tmp_path, WORKED_SPLIT, WORKED_DETECTIONS, "coco")
    with pytest.raises(ValueError, match="no such class in these records: bus"):
        class_thresholds(records, 0.5, {"bus": 0.2})
