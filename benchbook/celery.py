"""The Celery app; tasks are found in each app's ``tasks`` module."""

import os

from celery import Celery

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "benchbook.settings")

app = Celery("benchbook")
app.config_from_object("django.conf:settings", namespace="CELERY")
app.autodiscover_tasks()
