"""Split rows planted as an older schema stored them: migrate the evaluation app back,
create the rows through that schema's historical model, migrate forward again."""

import contextlib

from django.core.files.base import ContentFile
from django.core.files.storage import default_storage
from django.db import connection
from django.db.migrations.executor import MigrationExecutor
from django.utils import timezone

from evaluation import triggers


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
