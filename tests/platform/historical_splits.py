"""Split rows planted as an older schema stored them: migrate the evaluation app back,
create the rows through that schema's historical model, migrate forward again; then
such a row taken as a new split would be (its content check must fail), and an upload
scored against it."""

import contextlib

import pytest
from django.core.files.base import ContentFile
from django.core.files.storage import default_storage
from django.db import connection
from django.db.migrations.executor import MigrationExecutor
from django.utils import timezone

from evaluation import services as evaluation_services
from evaluation import triggers
from evaluation.models import BenchmarkSplit, Evaluation
from evaluation.storage import ContentMismatch

from .conftest import upload


def _migrate(target):
    executor = MigrationExecutor(connection)
    executor.loader.build_graph()
    executor.migrate(target)
    return executor.loader.project_state(target).apps


@contextlib.contextmanager
def schema_at(migration):
    """The historical ``BenchmarkSplit`` as of ``migration`` of the evaluation app; on
    exit every app is migrated to its latest and the append-only triggers reinstalled."""
    apps = _migrate([("evaluation", migration)])
    try:
        yield apps.get_model("evaluation", "BenchmarkSplit")
    finally:
        _migrate(MigrationExecutor(connection).loader.graph.leaf_nodes())
        triggers.install(connection)


def plant(historical, name, source, truth, **fields):
    """A frozen split row of ``historical`` holding the file ``source`` (read as
    ``truth``); ``fields`` give ``sha256`` and whatever that schema adds."""
    stored = default_storage.save(f"splits/{source.name}", ContentFile(source.read_bytes()))
    return historical.objects.create(
        name=name,
        revision=1,
        classes=list(truth.classes),
        class_counts={},
        image_count=truth.n_images,
        box_count=truth.n_boxes,
        source_format="json",
        truth_file=stored,
        annotation_policy="reference",
        frozen_at=timezone.now(),
        **fields,
    )


def taken_as(split, **fields):
    """The split's row again with ``fields`` changed in memory only (never saved), as a
    new split would be read: loading its truth raises ContentMismatch (so the check that
    the row as frozen passes is live). The changed row."""
    row = BenchmarkSplit.objects.get(pk=split.pk)
    for name, value in fields.items():
        setattr(row, name, value)
    with pytest.raises(ContentMismatch):
        evaluation_services.load_truth_of(row)
    return row


def score_upload(split, detections, run_tasks, protocols):
    """``detections`` received for ``split`` as an upload is (checked, then stored) and
    evaluated under ``protocols``, every task run by ``run_tasks``; the evaluations by
    protocol."""
    with evaluation_services.received_predictions(upload("dt.json", detections), split) as got:
        stored = got.store()
    run_tasks(evaluation_services.request_evaluations, split, stored, protocols)
    return {e.protocol: e for e in Evaluation.objects.filter(split=split, predictions=stored)}


def freeze(name, content):
    """``content`` (a COCO-style dict) frozen as split ``name`` revision 1, as an upload
    is: the twin check and the current hash scheme apply."""
    return evaluation_services.load_split(
        name=name, revision=1, truth=upload(f"{name}.json", content)
    )
