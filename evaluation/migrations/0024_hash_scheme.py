from django.db import migrations, models

from evaluation import triggers

# Splits stored before this migration were hashed with ids by their text only
# (engine GroundTruth.content_hash "untyped"): they keep that scheme (the AddField
# default), so their sha256 is never rewritten and still verifies; new splits are
# hashed "typed" (the AlterField). A split of numeric ids hashes alike under both.

HELP = (
    "How its content hash (sha256) was taken: typed (image and class ids that are not "
    'numbers hash with their kind, so ids 1 and "1" hash apart) or untyped (ids by '
    "their text only: splits frozen before keep that hash)."
)


def install(apps, schema_editor):
    triggers.install(schema_editor.connection)


class Migration(migrations.Migration):
    dependencies = [
        ("evaluation", "0023_vis_ratio_as_given"),
    ]

    operations = [
        migrations.AddField(
            model_name="benchmarksplit",
            name="hash_scheme",
            field=models.CharField(default="untyped", help_text=HELP, max_length=8),
        ),
        migrations.AlterField(
            model_name="benchmarksplit",
            name="hash_scheme",
            field=models.CharField(default="typed", help_text=HELP, max_length=8),
        ),
        migrations.RunPython(install, migrations.RunPython.noop),
    ]
