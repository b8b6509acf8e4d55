"""The database refuses changes to release decisions, judgements and their outcomes, and
TRUNCATE of the audit trail
(see releases/triggers.py)."""

from django.db import migrations

from releases import triggers


def install(apps, schema_editor):
    triggers.install(schema_editor.connection)


class Migration(migrations.Migration):
    dependencies = [("releases", "0013_prediction_set_evaluations")]
    # Going back leaves them: reversing the earlier trigger migration removes them all.
    operations = [migrations.RunPython(install, migrations.RunPython.noop)]
