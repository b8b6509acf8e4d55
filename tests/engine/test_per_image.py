"""Per-image counts and leave-one-out AP: leaving an image out equals re-scoring the
records with that image's weight 0 (``scoring.headline``), which equals removing it from
the files (``test_weights.py``); here checked against both."""

import json

import numpy as np
import pytest

from evaluation.engine import load_predictions, load_truth, match
from evaluation.engine.confusion import confusion_matrix
from evaluation.engine.per_image import (
    change_contributions,
    image_counts,
    leave_one_out,
    leave_one_out_metrics,
)
from evaluation.engine.scorecard import score_records
from evaluation.engine.scoring import headline

from .synthetic import make_detections, make_split


def _files(tmp_path, seed, n_classes=3, **options):
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=18, n_classes=n_classes)
    detections = make_detections(rng, split, **options)
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = load_truth(tmp_path / "gt.json")
    return split, detections, truth, load_predictions(tmp_path / "dt.json", truth)


@pytest.mark.parametrize("protocol", ["coco", "voc07", "voc", "recall40"])
@pytest.mark.parametrize("seed", range(2))
def test_leave_one_out_equals_rescoring_with_weight_zero(tmp_path, protocol, seed):
    _, _, truth, predictions = _files(tmp_path, seed, score_levels=10 if seed else None)
    records = match(truth, predictions, protocol)
    for k in range(len(records.classes)):
        ap, without = leave_one_out(records, protocol, k)
        assert ap == headline(records, protocol)[1][k] or np.isnan(ap)
        for i in range(records.n_images):
            w = np.ones(records.n_images, np.int64)
            w[i] = 0
            expected = headline(records, protocol, weights=w)[1][k]
            assert without[i] == expected or (np.isnan(expected) and np.isnan(without[i])), (
                k,
                i,
            )


def test_leave_one_out_inside_a_tag_slice(tmp_path):
    """With a 0/1 selection (a tag slice), an image outside it changes nothing and one
    inside it equals the slice re-scored without it."""
    _, _, truth, predictions = _files(tmp_path, 5)
    records = match(truth, predictions, "coco")
    mask = truth.tag_mask("night")
    assert 0 < mask.sum() < len(mask)
    ap, without = leave_one_out(records, "coco", 1, weights=mask)
    for i in range(records.n_images):
        w = mask.copy()
        w[i] = 0
        assert without[i] == headline(records, "coco", weights=w)[1][1]
    assert np.all(without[mask == 0] == ap)


def test_leave_one_out_equals_removing_the_image_from_the_files(tmp_path):
    """Removing an image's detections and boxes from the files and scoring again gives
    the same AP (the image stays in the split, holding nothing)."""
    split, detections, truth, predictions = _files(tmp_path, 7)
    records = match(truth, predictions, "coco")
    ap, without = leave_one_out(records, "coco", 0)
    image_id = int(truth.image_ids[3])
    split["annotations"] = [a for a in split["annotations"] if a["image_id"] != image_id]
    kept = [d for d in detections if d["image_id"] != image_id]
    (tmp_path / "gt2.json").write_text(json.dumps(split))
    (tmp_path / "dt2.json").write_text(json.dumps(kept))
    truth2 = load_truth(tmp_path / "gt2.json")
    rescored = match(truth2, load_predictions(tmp_path / "dt2.json", truth2), "coco")
    assert without[3] == pytest.approx(headline(rescored, "coco")[1][0], abs=1e-15)


def test_single_class_split(tmp_path):
    _, _, truth, predictions = _files(tmp_path, 2, n_classes=1)
    records = match(truth, predictions, "coco")
    _, without = leave_one_out(records, "coco", 0)
    for i in range(records.n_images):
        w = np.ones(records.n_images, np.int64)
        w[i] = 0
        assert without[i] == headline(records, "coco", weights=w)[1][0]


def test_change_contributions(tmp_path):
    """c_i = Δ - Δ_-i, with Δ_-i from the two record sets each re-scored without i."""
    _, _, truth, predictions = _files(tmp_path, 9)
    candidate = match(truth, predictions, "coco")
    _, _, _, other = _files(tmp_path, 9, hit_rate=0.5)
    baseline = match(truth, other, "coco")
    result = change_contributions(candidate, baseline, "coco", 2)
    delta = headline(candidate, "coco")[1][2] - headline(baseline, "coco")[1][2]
    assert result["change"] == delta
    for i in (0, 4, 11):
        w = np.ones(candidate.n_images, np.int64)
        w[i] = 0
        without = (
            headline(candidate, "coco", weights=w)[1][2]
            - headline(baseline, "coco", weights=w)[1][2]
        )
        assert result["contribution"][i] == delta - without


def test_image_counts_add_up_to_the_confusion_matrix(tmp_path):
    _, _, truth, predictions = _files(tmp_path, 4, score_levels=20)
    records = match(truth, predictions, "coco")
    counts = image_counts(records, 0.4)
    matrix = np.array(confusion_matrix(records, 0.4)["counts"])
    k = len(records.classes)
    assert counts["tp"].sum() == np.trace(matrix[:k, :k])
    assert counts["fp"].sum() == matrix[:, :k].sum() - np.trace(matrix[:k, :k])
    assert counts["missed"].sum() == matrix[:k, k].sum()
    one = image_counts(records, 0.4, class_index=1)
    assert one["tp"].sum() == matrix[1, 1] and one["missed"].sum() == matrix[1, k]


@pytest.mark.parametrize("cells", [1, 50, 120])
def test_batches_of_any_size_give_the_same_numbers(tmp_path, monkeypatch, cells):
    """All-point AP (``voc``) recomputes images a batch at a time (one left over, padded,
    included)."""
    from evaluation.engine import per_image

    _, _, truth, predictions = _files(tmp_path, 1)
    records = match(truth, predictions, "voc")
    expected = leave_one_out(records, "voc", 0)[1]
    monkeypatch.setattr(per_image, "BATCH_CELLS", cells)
    np.testing.assert_array_equal(leave_one_out(records, "voc", 0)[1], expected)


@pytest.mark.parametrize("protocol", ["coco", "voc"])
def test_classes_without_detections_or_without_boxes(tmp_path, protocol):
    """A class with boxes and no detection (AP 0) and one with detections and no box
    (absent, NaN) give what re-scoring gives, image by image."""
    rng = np.random.default_rng(5)
    split = make_split(rng, n_images=12, n_classes=3)
    detections = [d for d in make_detections(rng, split) if d["category_id"] != 2]
    split["annotations"] = [a for a in split["annotations"] if a["category_id"] != 3]
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = load_truth(tmp_path / "gt.json")
    records = match(truth, load_predictions(tmp_path / "dt.json", truth), protocol)
    for k, expected_base in ((1, 0.0), (2, None)):
        ap, without = leave_one_out(records, protocol, k)
        assert ap == expected_base if expected_base is not None else np.isnan(ap)
        for i in range(records.n_images):
            w = np.ones(records.n_images, np.int64)
            w[i] = 0
            expected = headline(records, protocol, weights=w)[1][k]
            assert without[i] == expected or (np.isnan(expected) and np.isnan(without[i]))


def _rescored(records, protocol, w, name, key):
    row = score_records(records, protocol, weights=w)["per_class"][name]
    return np.nan if row[key] is None else row[key]


@pytest.mark.parametrize("protocol,n_classes", [("coco", 3), ("voc", 3), ("coco", 1)])
@pytest.mark.parametrize("size", ["small", "medium", "large"])
def test_leave_one_out_in_a_size_bucket_equals_rescoring_that_bucket(
    tmp_path, protocol, n_classes, size
):
    """With a size bucket chosen, ΔAP is the change of that bucket's AP: each image
    left out equals, to the bit, the engine's scorecard (``AP_<size>`` per class, COCO
    area ranges, pycocotools' published rule) re-scored with the image's weight 0."""
    _, _, truth, predictions = _files(tmp_path, 3, n_classes=n_classes)
    records = match(truth, predictions, protocol)
    area = records.area_names.index(size)
    for k, name in enumerate(records.classes):
        ap, without = leave_one_out(records, protocol, k, area=area)
        whole = _rescored(records, protocol, None, name, f"AP_{size}")
        assert ap == whole or (np.isnan(ap) and np.isnan(whole))
        for i in range(records.n_images):
            w = np.ones(records.n_images, np.int64)
            w[i] = 0
            expected = _rescored(records, protocol, w, name, f"AP_{size}")
            assert without[i] == expected or (np.isnan(expected) and np.isnan(without[i])), (k, i)


@pytest.mark.parametrize("metric,iou", [("AP50", 0.5), ("AP75", 0.75)])
def test_leave_one_out_of_one_slot_equals_the_scorecards_row(tmp_path, metric, iou):
    """slot=t gives the class's AP at that IoU alone, equal to the bit to the
    scorecard's per-class AP50 / AP75 re-scored with the image's weight 0."""
    _, _, truth, predictions = _files(tmp_path, 4, score_levels=10)
    records = match(truth, predictions, "coco")
    slot = [float(t) for t in records.thresholds[:, 0]].index(iou)
    masks = (None, truth.tag_mask("night"))
    for k, name in enumerate(records.classes):
        for mask in masks:
            ap, without = leave_one_out(records, "coco", k, weights=mask, slot=slot)
            base = np.ones(records.n_images, np.int64) if mask is None else mask
            assert ap == _rescored(records, "coco", base, name, metric) or np.isnan(ap)
            for i in range(records.n_images):
                w = base.copy()
                w[i] = 0
                expected = _rescored(records, "coco", w, name, metric)
                assert without[i] == expected or (np.isnan(expected) and np.isnan(without[i]))


def _same(a, b):
    return np.array_equal(a, b, equal_nan=True)


@pytest.mark.parametrize("protocol,n_classes", [("coco", 3), ("coco", 1), ("voc", 2), ("voc07", 2)])
@pytest.mark.parametrize("area", [0, 1, 3])
def test_every_metric_in_one_pass_equals_each_metric_alone(tmp_path, protocol, n_classes, area):
    """``leave_one_out_metrics`` (what the worker stores at scoring time) gives, for AP
    and each IoU slot asked for, the same bits as ``leave_one_out`` of that metric —
    which the tests above hold against re-scoring with the image's weight 0 — in every
    size bucket, with and without a tag slice."""
    _, _, truth, predictions = _files(tmp_path, 6, n_classes=n_classes, score_levels=10)
    records = match(truth, predictions, protocol)
    slots = list(range(records.n_slots))
    for k in range(n_classes):
        for mask in (None, truth.tag_mask("night")):
            found = leave_one_out_metrics(records, protocol, k, mask, area=area, slots=slots)
            assert set(found) == {None, *slots}
            for m, (ap, without) in found.items():
                ap_alone, without_alone = leave_one_out(
                    records, protocol, k, mask, area=area, slot=m
                )
                assert _same(ap, ap_alone) and _same(without, without_alone), (k, m)


def test_every_metric_in_one_pass_against_rescoring(tmp_path):
    """The one-pass AP50 of each image left out equals the scorecard's per-class AP50
    re-scored with that image's weight 0, to the bit (outside check of the engine's own
    scorer, whose COCO rule is held against pycocotools in ``test_coco_reference.py``)."""
    _, _, truth, predictions = _files(tmp_path, 8, score_levels=10)
    records = match(truth, predictions, "coco")
    slot = [float(t) for t in records.thresholds[:, 0]].index(0.5)
    for k, name in enumerate(records.classes):
        ap, without = leave_one_out_metrics(records, "coco", k, slots=[slot])[slot]
        for i in range(records.n_images):
            w = np.ones(records.n_images, np.int64)
            w[i] = 0
            expected = _rescored(records, "coco", w, name, "AP50")
            assert _same(without[i], expected), (k, i)


@pytest.mark.parametrize("seed", range(6))
def test_leave_one_out_where_a_class_is_undefined_under_voc07(tmp_path, seed):
    """Most boxes difficult, few detections: a class whose every detection is ignored
    has no voc07 AP (NaN: the VOC 2007 devkit's max of 0/0 alone, ``test_oracle.py``),
    and leaving out the image holding them makes it 0. Leave-one-out (one pass, per
    metric) equals re-scoring with the image's weight 0."""
    rng = np.random.default_rng(700 + seed)
    split = make_split(rng, n_images=4, n_classes=5, boxes_per_image=3, width=200, height=150)
    for ann in split["annotations"]:
        ann["difficult"] = int(rng.random() < 0.6)
    detections = make_detections(
        rng, split, hit_rate=0.5, false_per_image=0.2, duplicate_rate=0.3, score_levels=3
    )
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = load_truth(tmp_path / "gt.json")
    records = match(truth, load_predictions(tmp_path / "dt.json", truth), "voc07")
    for k in range(len(records.classes)):
        expected = []
        for i in range(records.n_images):
            w = np.ones(records.n_images, np.int64)
            w[i] = 0
            expected.append(headline(records, "voc07", weights=w)[1][k])
        base = headline(records, "voc07")[1][k]
        found = [
            leave_one_out(records, "voc07", k),
            leave_one_out_metrics(records, "voc07", k)[None],
        ]
        for ap, without in found:
            assert _same(ap, base) and _same(without, np.array(expected)), k
