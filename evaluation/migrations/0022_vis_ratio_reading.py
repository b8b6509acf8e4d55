from django.db import migrations, models

from evaluation import triggers

# Splits stored before this migration were read without an annotation's vis_ratio key:
# they keep that reading (the AddField default), so their content hash still matches;
# new splits read it (the AlterField).

HELP = (
    "How an annotation's vis_ratio key was read: read (the visibility where "
    "visibility is absent, as the city-scale evaluation script reads it; counted) or "
    "unread (skipped: splits frozen before it was read keep that reading and their "
    "content hash)."
)


def install(apps, schema_editor):
    triggers.install(schema_editor.connection)


class Migration(migrations.Migration):
    dependencies = [
        ("evaluation", "0021_input_policies"),
    ]

    operations = [
        migrations.AddField(
            model_name="benchmarksplit",
            name="vis_ratio_reading",
            field=models.CharField(default="unread", help_text=HELP, max_length=6),
        ),
        migrations.AlterField(
            model_name="benchmarksplit",
            name="vis_ratio_reading",
            field=models.CharField(default="read", help_text=HELP, max_length=6),
        ),
        migrations.RunPython(install, migrations.RunPython.noop),
    ]
