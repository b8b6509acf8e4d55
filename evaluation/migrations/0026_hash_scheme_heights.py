from django.db import migrations, models

# Splits stored before this migration keep the scheme they were frozen with ("named",
# "typed" or "untyped"), so their sha256 is never rewritten and still verifies (a split
# whose annotations' own height keys differ from their boxes' h did not hash them); new
# splits are hashed "heights" (the new default), which hashes such keys, since
# miss-rate-cityscale reads them (engine 2.18.2). A split without such keys hashes
# alike under "heights" and "named".


HELP = (
    "How its content hash (sha256) was taken: heights (as named, and annotations' own "
    "height keys that differ from their box's h, which miss-rate-cityscale reads), named "
    "(as typed, and categories sharing a name hash their own names, so two categories "
    "named car and a file naming them 'car (id 1)', 'car (id 2)' hash apart: splits "
    "frozen before height keys were hashed keep that hash), typed (image and class ids "
    'that are not numbers hash with their kind, so ids 1 and "1" hash apart: splits '
    "frozen before own names were hashed keep that hash) or untyped (ids by their text "
    "only: splits frozen before keep that hash)."
)


class Migration(migrations.Migration):
    dependencies = [
        ("evaluation", "0025_hash_scheme_named"),
    ]

    operations = [
        migrations.AlterField(
            model_name="benchmarksplit",
            name="hash_scheme",
            field=models.CharField(
                default="heights",
                help_text=HELP,
                max_length=8,
            ),
        ),
    ]
