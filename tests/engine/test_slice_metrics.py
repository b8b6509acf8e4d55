"""Every rule metric (AP, AP50, AP75, recall) of a tag or size slice, mean and per class,
against the reference implementation, pycocotools 2.0.11: a tag slice equals
``COCOeval`` on the split cut to the tagged images; a size slice equals ``COCOeval``'s
own area range (``areaRng`` index 1-3 of ``eval['precision']`` / ``eval['recall']``,
``maxDets`` 100)."""

import json

import numpy as np
import pytest

from evaluation.engine import evaluate, load_predictions, load_truth, match, slice_scores

from .conftest import pycocotools_eval
from .synthetic import make_detections, make_split

TOLERANCE = 1e-12
METRICS = ("AP", "AP50", "AP75", "recall")


def _scenario(seed):
    rng = np.random.default_rng(seed)
    split = make_split(
        rng, n_images=16, n_classes=3, boxes_per_image=5, crowd_rate=0.1, tags=("night",)
    )
    detections = make_detections(rng, split, hit_rate=0.8, false_per_image=2)
    return split, detections


def _write(tmp_path, name, split, detections):
    gt, dt = tmp_path / f"{name}-gt.json", tmp_path / f"{name}-dt.json"
    gt.write_text(json.dumps(split))
    dt.write_text(json.dumps(detections))
    return gt, dt


def _reference(evaluator, area):
    """pycocotools' numbers of one area range: mean as ``summarize`` takes it
    (``mean(s[s > -1])``), per class as the engine's per-class row (mean over the
    recall points and IoU thresholds of ``precision[..., k, area, maxDets=100]``)."""
    precision = evaluator.eval["precision"][:, :, :, area, 2]
    recall = evaluator.eval["recall"][:, :, area, 2]
    ious = evaluator.params.iouThrs
    t50, t75 = int(np.argmin(abs(ious - 0.5))), int(np.argmin(abs(ious - 0.75)))

    def mean(s):
        s = s[s > -1]
        return float(np.mean(s)) if s.size else None

    out = {
        "mean": {
            "AP": mean(precision),
            "AP50": mean(precision[t50]),
            "AP75": mean(precision[t75]),
            "recall": mean(recall),
        }
    }
    for k in range(precision.shape[2]):
        present = precision[0, 0, k] > -1
        out[k] = {
            "AP": float(precision[:, :, k].mean()) if present else None,
            "AP50": float(precision[t50, :, k].mean()) if present else None,
            "AP75": float(precision[t75, :, k].mean()) if present else None,
            "recall": float(recall[:, k].mean()) if present else None,
        }
    return out


def _same(ours, expected):
    for metric in METRICS:
        if expected[metric] is None:
            assert ours[metric] is None, metric
        else:
            assert ours[metric] == pytest.approx(expected[metric], abs=TOLERANCE), metric


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_tag_slice_has_every_rule_metric_of_the_split_cut_to_that_tag(tmp_path, seed):
    split, detections = _scenario(seed)
    gt, dt = _write(tmp_path, "full", split, detections)
    truth = load_truth(gt)
    ours = evaluate(truth, load_predictions(dt, truth), "coco")["slices"]["tag"]["night"]

    night = {im["id"] for im in split["images"] if "night" in im["tags"]}
    cut = {
        **split,
        "images": [im for im in split["images"] if im["id"] in night],
        "annotations": [a for a in split["annotations"] if a["image_id"] in night],
    }
    reference = _reference(
        pycocotools_eval(
            *_write(tmp_path, "cut", cut, [d for d in detections if d["image_id"] in night])
        ),
        area=0,
    )
    _same(ours, reference["mean"])
    for k, category in enumerate(split["categories"]):
        _same(ours["classes"][category["name"]], reference[k])
        assert ours["per_class"][category["name"]] == ours["classes"][category["name"]]["AP"]


@pytest.mark.parametrize("seed", [4, 5])
def test_a_size_slice_has_every_rule_metric_of_the_reference_area_range(tmp_path, seed):
    split, detections = _scenario(seed)
    gt, dt = _write(tmp_path, "full", split, detections)
    truth = load_truth(gt)
    sizes = evaluate(truth, load_predictions(dt, truth), "coco")["slices"]["size"]
    evaluator = pycocotools_eval(gt, dt)
    for area, name in enumerate(("small", "medium", "large"), start=1):
        reference = _reference(evaluator, area)
        # The stored size AP is the mean of the per-class APs (as before these
        # metrics): equal to the flattened mean up to rounding.
        assert sizes[name]["AP"] == pytest.approx(reference["mean"]["AP"], abs=1e-9)
        _same({**sizes[name], "AP": reference["mean"]["AP"]}, reference["mean"])
        for k, category in enumerate(split["categories"]):
            _same(sizes[name]["classes"][category["name"]], reference[k])


def test_slice_scores_of_every_image_equal_the_whole_split(tmp_path):
    """A mask of ones is the whole split: the same AP50, AP75 and recall the scorecard's
    per-class rows and summary report (AR100 under coco)."""
    split, detections = _scenario(6)
    gt, dt = _write(tmp_path, "full", split, detections)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    for protocol in ("coco", "voc"):
        whole = evaluate(truth, predictions, protocol)
        records = match(truth, predictions, protocol)
        ours = slice_scores(records, protocol, weights=np.ones(truth.n_images, np.int64))
        assert ours["AP"] == whole["summary"]["AP"]
        for name, row in whole["per_class"].items():
            for metric in METRICS:
                assert ours["classes"][name][metric] == row.get(metric), (protocol, metric)
        if protocol == "coco":
            assert ours["AP50"] == whole["summary"]["AP50"]
            assert ours["AP75"] == whole["summary"]["AP75"]
            assert ours["recall"] == whole["summary"]["AR100"]
        else:  # no pycocotools summary: AP50/AP75 are not reported, as for the split
            assert ours["AP50"] is None and ours["AP75"] is None
            assert ours["recall"] == whole["summary"]["recall"]


def test_an_empty_slice_is_absent_not_zero(tmp_path):
    split, detections = _scenario(7)
    gt, dt = _write(tmp_path, "full", split, detections)
    truth = load_truth(gt)
    records = match(truth, load_predictions(dt, truth), "coco")
    ours = slice_scores(records, "coco", weights=np.zeros(truth.n_images, np.int64))
    assert all(ours[m] is None for m in METRICS)
    assert all(row[m] is None for row in ours["classes"].values() for m in METRICS)
