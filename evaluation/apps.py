from django.apps import AppConfig
from django.db.models.signals import post_migrate


def _reinstall_triggers(sender, using, **kwargs):
    """After every ``migrate``: SQLite drops a table's triggers when a migration rebuilds
    the table, so they are put back (idempotent; the migrations install them first)."""
    from django.db import connections

    from . import triggers

    triggers.install(connections[using])


def _discard_shard_files(sender, evaluation, **kwargs):
    """A failed evaluation keeps its shard rows (and timings) but not their files."""
    from .sharding import discard_files

    discard_files(evaluation)


class EvaluationConfig(AppConfig):
    name = "evaluation"
    verbose_name = "Evaluation"

    def ready(self):
        post_migrate.connect(_reinstall_triggers, sender=self, dispatch_uid="evaluation-triggers")
        from .signals import evaluation_failed

        evaluation_failed.connect(_discard_shard_files, dispatch_uid="evaluation-shard-files")
