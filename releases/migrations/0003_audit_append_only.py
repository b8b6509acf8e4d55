"""The database refuses UPDATE and DELETE on the audit trail."""

from django.db import migrations

from releases import triggers


def install(apps, schema_editor):
    triggers.install(schema_editor.connection)


def remove(apps, schema_editor):
    triggers.remove(schema_editor.connection)


class Migration(migrations.Migration):
    dependencies = [("releases", "0002_audit_trail")]
    operations = [migrations.RunPython(install, remove)]
