from django.apps import AppConfig
from django.db.models.signals import post_migrate


def _reinstall_triggers(sender, using, **kwargs):
    """After every ``migrate`` (see ``evaluation.apps``)."""
    from django.db import connections

    from . import triggers

    triggers.install(connections[using])


class ReleasesConfig(AppConfig):
    name = "releases"
    verbose_name = "Releases"

    def ready(self):
        post_migrate.connect(_reinstall_triggers, sender=self, dispatch_uid="releases-triggers")
        from .db_roles import grant_after_migrate

        post_migrate.connect(grant_after_migrate, sender=self, dispatch_uid="releases-app-role")
        from evaluation import signals as evaluation_signals

        from . import signals

        evaluation_signals.split_frozen.connect(signals.split_frozen, dispatch_uid="audit-split")
        evaluation_signals.result_recorded.connect(
            signals.result_recorded, dispatch_uid="audit-result"
        )
        evaluation_signals.content_mismatch.connect(
            signals.content_mismatch, dispatch_uid="audit-content-mismatch"
        )
        for signal in (
            evaluation_signals.evaluation_finished,
            evaluation_signals.evaluation_failed,
        ):
            signal.connect(signals.judge_when_complete, dispatch_uid=f"judge-{id(signal)}")
