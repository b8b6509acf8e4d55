"""Celery tasks of releases: thin, idempotent, ids only."""

from celery import shared_task

from . import criteria, notify
from .models import ModelVersion


@shared_task(acks_late=True)
def judge(version_id):
    """(Re)judge a version against its detector's criteria; outcomes are replaced."""
    version = ModelVersion.objects.select_related("detector").filter(pk=version_id).first()
    if version is not None and criteria.judge(version):
        notify.notify(version)
