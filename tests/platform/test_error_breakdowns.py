"""TIDE's error breakdown is stored when a scorecard is written, and an older scorecard's
is computed once on first use and stored; pages read the stored one."""

import numpy as np
import pytest
from django.db import DatabaseError, transaction

from evaluation import breakdowns, outcomes
from evaluation.engine import get_protocol, tide
from evaluation.models import ErrorBreakdown, Scorecard
from releases import services
from releases.selectors import errors

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


def _score(run_tasks, split, split_truth, version, users, seed=6):
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth, seed=seed)),
        users["engineer"],
    )
    return Scorecard.objects.get(protocol="coco")


def _same(stored, computed):
    """Equal as JSON: floats exactly, absent values None."""
    assert stored["types"] == list(computed["types"])
    for k, v in computed["mean"]["delta"].items():
        assert stored["mean"]["delta"][k] == v
    for name, entry in computed["per_class"].items():
        assert stored["per_class"][name]["AP"] == entry["AP"]
        for k, v in entry["delta"].items():
            assert stored["per_class"][name]["delta"][k] == v


def test_scoring_stores_the_breakdown_of_its_records(run_tasks, split, split_truth, version, users):
    card = _score(run_tasks, split, split_truth, version, users)
    row = ErrorBreakdown.objects.get(scorecard=card)
    assert row.records_sha256 == card.records_sha256
    _same(row.breakdown, tide.error_breakdown(outcomes.records_of(card), get_protocol("coco")))
    assert any(v for v in row.breakdown["mean"]["delta"].values())  # not an empty shell


def test_a_stored_breakdown_is_read_not_computed(
    run_tasks, split, split_truth, version, users, monkeypatch
):
    card = _score(run_tasks, split, split_truth, version, users)
    monkeypatch.setattr(breakdowns, "compute", lambda *a: pytest.fail("computed again"))
    errors._BREAKDOWNS.clear()
    found = errors.version_breakdowns(version)
    assert found and found[0]["split"] == card.evaluation.split


def test_an_older_scorecard_computes_once_and_stores(
    run_tasks, split, split_truth, version, users, monkeypatch
):
    """A scorecard written before the hook: no row; the first read computes it from the
    hash-checked records and stores it; the next read uses the row."""
    monkeypatch.setattr(breakdowns, "store", lambda scorecard, records, found=None: None)
    card = _score(run_tasks, split, split_truth, version, users)
    assert not ErrorBreakdown.objects.filter(scorecard=card).exists()
    monkeypatch.undo()
    first = breakdowns.breakdown_of(card)
    row = ErrorBreakdown.objects.get(scorecard=card)
    assert row.breakdown == first
    _same(first, tide.error_breakdown(outcomes.records_of(card), get_protocol("coco")))
    calls = []
    monkeypatch.setattr(breakdowns, "compute", lambda *a: calls.append(a))
    assert breakdowns.breakdown_of(card) == first and calls == []


def test_an_older_scorecard_with_a_changed_records_file_says_so(
    run_tasks, split, split_truth, version, users, monkeypatch
):
    """Computing on demand reads the records through their hash check: an edited file is
    a ContentMismatch shown in place on the page, and nothing is stored."""
    from evaluation.storage import ContentMismatch

    monkeypatch.setattr(breakdowns, "store", lambda scorecard, records, found=None: None)
    card = _score(run_tasks, split, split_truth, version, users)
    outcomes._RECORDS.clear()  # read from storage again, as a fresh process
    with card.records.open("r+b") as f:
        f.seek(100)
        byte = f.read(1)
        f.seek(100)
        f.write(bytes([byte[0] ^ 0xFF]))
    with pytest.raises(ContentMismatch):
        breakdowns.breakdown_of(card)
    assert not ErrorBreakdown.objects.filter(scorecard=card).exists()


def test_stored_breakdowns_are_append_only(run_tasks, split, split_truth, version, users):
    card = _score(run_tasks, split, split_truth, version, users)
    row = ErrorBreakdown.objects.get(scorecard=card)
    with pytest.raises(DatabaseError), transaction.atomic():
        ErrorBreakdown.objects.filter(pk=row.pk).update(breakdown={"mean": np.nan})
