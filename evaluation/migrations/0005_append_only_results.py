"""The database refuses changes to stored results and finished evaluations, and TRUNCATE
of frozen splits (see evaluation/triggers.py)."""

from django.db import migrations

from evaluation import triggers


def install(apps, schema_editor):
    triggers.install(schema_editor.connection)


class Migration(migrations.Migration):
    dependencies = [("evaluation", "0004_leases_and_record_hashes")]
    # Going back leaves them: reversing the earlier trigger migration removes them all.
    operations = [migrations.RunPython(install, migrations.RunPython.noop)]
