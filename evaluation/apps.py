from django.apps import AppConfig
from django.db.models.signals import post_migrate


def _reinstall_triggers(sender, using, **kwargs):
    """After every ``migrate``: SQLite drops a table's triggers when a migration rebuilds
    the table, so they are put back (idempotent; the migrations install them first)."""
    from django.db import connections

    from . import triggers

    triggers.install(connections[using])


class EvaluationConfig(AppConfig):
    name = "evaluation"
    verbose_name = "Evaluation"

    def ready(self):
        post_migrate.connect(_reinstall_triggers, sender=self, dispatch_uid="evaluation-triggers")
