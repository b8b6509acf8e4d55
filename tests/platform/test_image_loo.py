"""The worker stores each image's leave-one-out AP with the result (``image_loo``): with
it or not at all, append-only, the same numbers as computing from the records."""

import os

import numpy as np
import pytest
from django.conf import settings as django_settings
from django.db import DatabaseError, transaction

from evaluation import image_loo, scoring
from evaluation.engine import per_image
from evaluation.models import Evaluation, ImageLeaveOneOut, Scorecard
from evaluation.outcomes import records_of
from releases import services

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


def _submit(version, split, split_truth, users, run_tasks):
    """Upload predictions for ``split``; the worker scores them (coco and voc)."""
    dets = upload("p.json", detections_for(split_truth))
    run_tasks(services.submit_predictions, version, split, dets, users["engineer"])


def _loo_files():
    folder = os.path.join(django_settings.MEDIA_ROOT, "leave-one-out")
    return sorted(os.listdir(folder)) if os.path.isdir(folder) else []


def test_each_scorecard_gets_its_file_with_the_records_numbers(
    version, split, split_truth, users, run_tasks
):
    """One row per scorecard (both protocols), its members covering every metric of
    the protocol, size bucket and tag; the untagged AP50 member equals
    ``per_image.leave_one_out`` of the stored records, class by class, to the bit."""
    _submit(version, split, split_truth, users, run_tasks)
    cards = Scorecard.objects.all()
    assert cards.count() == 2 and ImageLeaveOneOut.objects.count() == 2
    assert len(_loo_files()) == 2
    for card in cards:
        row = image_loo.row_of(card)
        records = records_of(card)
        metrics = image_loo.metric_slots(records)
        expected_metrics = {"AP", "AP50", "AP75"} if card.protocol == "coco" else {"AP", "AP50"}
        assert set(metrics) == expected_metrics, card.protocol
        assert len(row.members) == len(metrics) * len(records.area_names) * (1 + len(split.tags))
        aps, without = image_loo.read(row, image_loo.key("AP50", "all", ""))
        for k in range(len(records.classes)):
            ap, alone = per_image.leave_one_out(records, card.protocol, k, slot=metrics["AP50"])
            assert np.array_equal(aps[k], ap, equal_nan=True)
            assert np.array_equal(without[k], alone, equal_nan=True)


def test_a_failed_store_keeps_neither_row_nor_file(
    version, split, split_truth, users, run_tasks, monkeypatch
):
    """When the result's transaction fails after the row and file were saved (here:
    the prediction file's count written after them), the evaluation fails with the
    error and neither the row nor the file of the leave-one-out AP stays."""

    class Broken:
        class objects:
            @staticmethod
            def filter(**kwargs):
                raise RuntimeError("storage of the count failed")

    monkeypatch.setattr(scoring, "PredictionFile", Broken)
    _submit(version, split, split_truth, users, run_tasks)
    assert set(Evaluation.objects.values_list("state", flat=True)) == {"failed"}
    assert "storage of the count failed" in Evaluation.objects.first().error
    assert not ImageLeaveOneOut.objects.exists() and _loo_files() == []


def test_rows_are_append_only(version, split, split_truth, users, run_tasks):
    """The database refuses UPDATE and DELETE of a stored row (triggers, as for
    scorecards)."""
    _submit(version, split, split_truth, users, run_tasks)
    row = ImageLeaveOneOut.objects.first()
    for change in (
        lambda: ImageLeaveOneOut.objects.filter(pk=row.pk).update(members={}),
        lambda: ImageLeaveOneOut.objects.filter(pk=row.pk).delete(),
    ):
        with pytest.raises(DatabaseError, match="append-only"), transaction.atomic():
            change()


def test_a_row_of_another_engine_version_is_not_read(
    version, split, split_truth, users, run_tasks, monkeypatch
):
    """A file stored by another engine version (or layout) is not used: the list
    computes from the records."""
    _submit(version, split, split_truth, users, run_tasks)
    card = Scorecard.objects.filter(protocol="coco").get()
    assert image_loo.row_of(card) is not None
    monkeypatch.setattr(image_loo.engine, "ENGINE_VERSION", "99.0.0")
    assert image_loo.row_of(card) is None
    monkeypatch.setattr(image_loo, "_MEMBERS", None)
    assert image_loo.stored(card, "AP", "all", "") is None


@pytest.mark.parametrize("protocol", ["coco", "voc", "voc07", "recall40"])
def test_the_default_budget_keeps_5000_images_and_refuses_100000(protocol):
    """``BENCHBOOK_LOO_MAX_BYTES`` as shipped: at 80 classes a 5,000-image split with
    two tags gets its file under every preset, a 100,000-image split without tags does
    not (its file would be 512-768 MB, and its computing time grows with it). The
    keys are the file's own (``keys_of``: the preset's metrics x size buckets x tag
    slices)."""
    from types import SimpleNamespace

    from evaluation import engine

    preset = engine.get_protocol(protocol)
    classes = [f"class_{k}" for k in range(80)]
    records = SimpleNamespace(
        thresholds=preset.threshold_table(classes),
        area_names=tuple(name for name, *_ in preset.area_ranges),
    )
    small = len(image_loo.keys_of(records, ["night", "rain"]))
    large = len(image_loo.keys_of(records, []))
    assert image_loo.fits(small, 80, 5000)
    assert not image_loo.fits(large, 80, 100_000)
