from django.db import migrations, models

from evaluation import triggers

# Splits stored before this migration keep the scheme they were frozen with ("typed" or
# "untyped"), so their sha256 is never rewritten and still verifies (a split whose
# categories share a name hashed their shown names only); new splits are hashed
# "named" (the new default): such categories hash their own names too. A split whose
# names are all its own hashes alike under "named" and "typed".

HELP = (
    "How its content hash (sha256) was taken: named (as typed, and categories sharing "
    "a name hash their own names, so two categories named car and a file naming them "
    "'car (id 1)', 'car (id 2)' hash apart), typed (image and class ids that are not "
    'numbers hash with their kind, so ids 1 and "1" hash apart: splits frozen before '
    "own names were hashed keep that hash) or untyped (ids by their text only: splits "
    "frozen before keep that hash)."
)


def install(apps, schema_editor):
    triggers.install(schema_editor.connection)


class Migration(migrations.Migration):
    dependencies = [
        ("evaluation", "0024_hash_scheme"),
    ]

    operations = [
        migrations.AlterField(
            model_name="benchmarksplit",
            name="hash_scheme",
            field=models.CharField(default="named", help_text=HELP, max_length=8),
        ),
        migrations.RunPython(install, migrations.RunPython.noop),
    ]
