from django.db import migrations, models

from evaluation import triggers

# Splits stored before this migration keep the reading they were frozen with ("read"
# or "unread"), so their content hash still matches; new splits read vis_ratio as the
# city-scale evaluation script does ("as-given", the new default).

HELP = (
    "How an annotation's vis_ratio key was read: as-given (as the city-scale "
    "evaluation script reads it, for miss-rate-cityscale: any number or boolean, over "
    "a visibility key too; counted), read (the visibility where visibility is absent, "
    "within 0-1: splits frozen with engines 2.9-2.10) or unread (skipped: splits "
    "frozen before it was read). Each keeps its splits' content hash."
)


def install(apps, schema_editor):
    triggers.install(schema_editor.connection)


class Migration(migrations.Migration):
    dependencies = [
        ("evaluation", "0022_vis_ratio_reading"),
    ]

    operations = [
        migrations.AlterField(
            model_name="benchmarksplit",
            name="vis_ratio_reading",
            field=models.CharField(default="as-given", help_text=HELP, max_length=8),
        ),
        migrations.RunPython(install, migrations.RunPython.noop),
    ]
