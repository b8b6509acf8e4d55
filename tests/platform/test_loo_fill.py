"""Older evaluations get their per-image leave-one-out file (``loo_fill``, ``manage.py
fill_leave_one_out``, the task ``fill_leave_one_out``): one run stores it, a second does
nothing, the list then reads it, a changed records file is refused and audited.

The numbers are checked against ``engine.per_image.leave_one_out`` of the stored
records (itself checked against re-scoring with the engine in test_cause_pages.py)."""

import io
import json
import uuid

import numpy as np
import pytest
from django.core.management import CommandError, call_command

from evaluation import engine, image_loo, loo_fill, scoring, tasks
from evaluation.engine import per_image
from evaluation.models import ImageLeaveOneOut, Scorecard
from evaluation.outcomes import records_of
from releases import services
from releases.models import AuditEvent
from releases.selectors import image_list

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


@pytest.fixture
def older(version, split, split_truth, users, run_tasks, monkeypatch):
    """Scorecards stored as before the leave-one-out file existed (the worker's
    ``prepare`` gave nothing), both protocols."""
    with monkeypatch.context() as m:
        m.setattr(scoring.image_loo, "prepare", lambda *args, **kwargs: None)
        dets = upload("p.json", detections_for(split_truth))
        run_tasks(services.submit_predictions, version, split, dets, users["engineer"])
    assert Scorecard.objects.count() == 2 and not ImageLeaveOneOut.objects.exists()
    monkeypatch.setattr(image_loo, "_MEMBERS", None)  # nothing kept from another test
    image_list._ROWS.clear()
    image_list._CLASS_LOO.clear()
    return Scorecard.objects.order_by("pk")


def _command(*args):
    out, err = io.StringIO(), io.StringIO()
    call_command("fill_leave_one_out", *args, stdout=out, stderr=err)
    return out.getvalue(), err.getvalue()


def test_one_run_stores_the_file_a_second_does_nothing(older):
    """The first run stores one row per scorecard, its members equal to the records'
    leave-one-out AP to the bit; the second finds nothing to fill and stores nothing."""
    assert set(loo_fill.wanting()) == set(older)
    out, _ = _command()
    assert out.count(": stored ") == 2 and out.strip().endswith("2 processed, 0 failed"), out
    rows = ImageLeaveOneOut.objects.order_by("pk")
    assert [r.scorecard_id for r in rows] == [c.pk for c in older]
    for card in older:
        records = records_of(card)
        slot = image_loo.metric_slots(records)["AP50"]
        aps, without = image_loo.read(image_loo.row_of(card), image_loo.key("AP50", "all", ""))
        for k in range(len(records.classes)):
            ap, alone = per_image.leave_one_out(records, card.protocol, k, slot=slot)
            assert np.array_equal(aps[k], ap, equal_nan=True)
            assert np.array_equal(without[k], alone, equal_nan=True)
    files = [r.file.name for r in rows]
    out, _ = _command()
    assert "0 processed, 0 failed" in out, out
    assert [r.file.name for r in ImageLeaveOneOut.objects.order_by("pk")] == files
    assert loo_fill.fill(older[0].pk).status == "present"


def test_the_list_reads_the_filled_file(older, version, split, users, client, monkeypatch):
    """Before the run the list computes each class's leave-one-out from the records;
    after it, the same page reads the file (nothing computed) and shows the same rows."""
    calls = []
    real = per_image.leave_one_out

    def counted(*args, **kwargs):
        calls.append(args[2])
        return real(*args, **kwargs)

    monkeypatch.setattr(per_image, "leave_one_out", counted)
    client.force_login(users["engineer"])
    url = f"/api/v1/versions/{version.pk}/images/?split={split.pk}"
    before = client.get(url).json()
    assert calls, "without the file the list computes from the records"
    _command()
    image_list._ROWS.clear()
    image_list._CLASS_LOO.clear()
    calls.clear()
    after = client.get(url).json()
    assert calls == [] and after == before


def test_a_changed_records_file_is_not_used(older):
    """A records file changed after it was stored is refused with its name, the
    mismatch audited; no row and no file are stored, the command exits with an error,
    and the other scorecard is still filled."""
    changed = older[0]
    with open(changed.records.path, "ab") as f:
        f.write(b"\0")
    with pytest.raises(CommandError, match="1 scorecard"):
        _command()
    assert not ImageLeaveOneOut.objects.filter(scorecard=changed).exists()
    assert ImageLeaveOneOut.objects.filter(scorecard=older[1]).exists()
    assert AuditEvent.objects.filter(
        kind=AuditEvent.Kind.CONTENT_MISMATCH, subject=f"scorecard:{changed.pk}"
    ).exists()
    import os

    from django.conf import settings

    folder = os.path.join(settings.MEDIA_ROOT, "leave-one-out")
    assert len(os.listdir(folder)) == 1  # the other scorecard's; no orphan


def test_a_newer_engine_adds_its_row_beside_the_old(older, monkeypatch):
    """Rows are append-only: after an engine upgrade the scorecard wants a file again,
    gets a second row, and the old one stays as it was."""
    _command()
    old = {r.pk: (r.engine_version, r.file.name) for r in ImageLeaveOneOut.objects.all()}
    monkeypatch.setattr(engine, "ENGINE_VERSION", "99.0.0")
    assert set(loo_fill.wanting()) == set(older)
    _command("--evaluation", str(older[0].evaluation_id))
    rows = ImageLeaveOneOut.objects.filter(scorecard=older[0]).order_by("pk")
    assert [r.engine_version for r in rows][-1] == "99.0.0" and rows.count() == 2
    for pk, kept in old.items():
        row = ImageLeaveOneOut.objects.get(pk=pk)
        assert (row.engine_version, row.file.name) == kept
    assert image_loo.row_of(older[0]).engine_version == "99.0.0"
    assert list(loo_fill.wanting()) == [older[1]]


def test_queue_sends_one_idempotent_task_per_scorecard(older, monkeypatch):
    """``--queue`` sends one task per scorecard (ids through JSON, as a broker carries
    them); running every task twice stores one row each."""
    sent = []
    monkeypatch.setattr(tasks.fill_leave_one_out, "delay", lambda *args: sent.append(args))
    out, _ = _command("--queue")
    assert sorted(sent) == sorted((c.pk,) for c in older) and out.count(": queued") == 2
    for args in sent * 2:
        args = json.loads(json.dumps(args))
        tasks.fill_leave_one_out.apply(args=args, task_id=str(uuid.uuid4()), throw=True)
    assert ImageLeaveOneOut.objects.count() == 2
    assert list(loo_fill.wanting()) == []


def test_dry_run_and_unknown_evaluations(older):
    """``--dry-run`` lists and stores nothing; an evaluation with nothing to fill is
    named as such."""
    out, _ = _command("--dry-run")
    assert out.count("no leave-one-out file") == 2 and not ImageLeaveOneOut.objects.exists()
    out, _ = _command("--evaluation", "987654")
    assert "evaluation 987654: nothing to fill" in out


def test_a_file_over_the_budget_is_skipped_not_stored(older, settings):
    """Over ``BENCHBOOK_LOO_MAX_BYTES`` the worker stores no file (``image_loo.fits``);
    the fill does the same and says so: nothing stored, the list keeps computing."""
    settings.BENCHBOOK_LOO_MAX_BYTES = 1
    out, _ = _command()
    assert out.count("skipped the file would exceed BENCHBOOK_LOO_MAX_BYTES") == 2, out
    assert not ImageLeaveOneOut.objects.exists()


def test_a_fill_that_finishes_first_wins_the_other_stores_nothing(older, monkeypatch):
    """Two fills of one scorecard (two workers, or the command beside a task): the one
    whose transaction comes second finds the row under the scorecard's lock, stores
    nothing and leaves no file behind. Here the second fill runs, whole, while the
    first is between its prepare and its transaction."""
    import os

    from django.conf import settings

    card = older[0]
    real = image_loo.prepare
    calls = []

    def prepare_then_let_another_fill_finish(*args, **kwargs):
        prepared = real(*args, **kwargs)
        if not calls:
            calls.append("inner")
            assert loo_fill.fill(card.pk).status == "stored"
        return prepared

    monkeypatch.setattr(image_loo, "prepare", prepare_then_let_another_fill_finish)
    assert loo_fill.fill(card.pk).status == "present"
    assert ImageLeaveOneOut.objects.filter(scorecard=card).count() == 1
    folder = os.path.join(settings.MEDIA_ROOT, "leave-one-out")
    assert len(os.listdir(folder)) == 1


def test_a_missing_records_file_is_named_and_nothing_is_stored(older):
    """A records file gone from the storage: the command names the evaluation and the
    file, stores nothing for it, fills the other and exits with an error."""
    import os

    gone = older[0]
    os.remove(gone.records.path)
    out = io.StringIO()
    err = io.StringIO()
    with pytest.raises(CommandError, match="changed or is missing"):
        call_command("fill_leave_one_out", stdout=out, stderr=err)
    assert f"evaluation {gone.evaluation_id} " in err.getvalue()
    assert gone.records.name in err.getvalue() and "could not be read" in err.getvalue()
    assert not ImageLeaveOneOut.objects.filter(scorecard=gone).exists()
    assert ImageLeaveOneOut.objects.filter(scorecard=older[1]).exists()
