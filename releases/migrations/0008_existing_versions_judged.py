"""Versions from before ``judged_at`` count as judged now, so that the judging sweep
does not judge (and notify) the whole history again on the first deploy."""

from django.db import migrations
from django.utils import timezone


def mark_judged(apps, schema_editor):
    apps.get_model("releases", "ModelVersion").objects.filter(judged_at__isnull=True).update(
        judged_at=timezone.now()
    )


class Migration(migrations.Migration):
    dependencies = [("releases", "0007_api_tokens_and_judged_at")]

    operations = [migrations.RunPython(mark_judged, migrations.RunPython.noop)]
