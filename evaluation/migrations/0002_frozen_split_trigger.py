"""The database itself refuses UPDATE and DELETE of a frozen benchmark split."""

from django.db import migrations

from evaluation import triggers


def install(apps, schema_editor):
    triggers.install(schema_editor.connection)


def remove(apps, schema_editor):
    triggers.remove(schema_editor.connection)


class Migration(migrations.Migration):
    dependencies = [("evaluation", "0001_initial")]
    operations = [migrations.RunPython(install, remove)]
