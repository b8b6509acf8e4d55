"""Benchbook's settings package: settings, root URLs, the Celery app, WSGI."""

from .celery import app as celery_app

__all__ = ["celery_app"]
