import os

from django.core.wsgi import get_wsgi_application

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "benchbook.settings")
application = get_wsgi_application()

from benchbook.warm import warm  # noqa: E402 — needs the apps loaded above

warm()
