from django.db import migrations, models

# Splits stored before this migration keep the scheme they were frozen with ("heights",
# "named", "typed" or "untyped"), so their sha256 is never rewritten and still verifies
# (a split whose annotation ids repeat did not hash the annotations a later one with
# their id replaces); new splits are hashed "repeats" (the new default), which hashes
# them, since voc, voc07, kitti2d, miss-rate and miss-rate-caltech read them as given
# (engine 2.21.0; hashed from 2.22.0). A split without repeated ids hashes alike under
# "repeats" and "heights".


HELP = (
    "How its content hash (sha256) was taken: repeats (as heights, and the annotations "
    "of a repeated annotation id as given, which voc, voc07, kitti2d and the toolbox's "
    "miss rates read where pycocotools reads copies of the last: two files differing in "
    "an annotation a later one with its id replaces hash apart), heights (as named, and "
    "annotations' own height keys that differ from their box's h, which "
    "miss-rate-cityscale reads: splits frozen before repeated ids as given were hashed "
    "keep that hash), named (as typed, and categories sharing a name hash their own "
    "names, so two categories named car and a file naming them 'car (id 1)', 'car (id "
    "2)' hash apart: splits frozen before height keys were hashed keep that hash), typed "
    '(image and class ids that are not numbers hash with their kind, so ids 1 and "1" '
    "hash apart: splits frozen before own names were hashed keep that hash) or untyped "
    "(ids by their text only: splits frozen before keep that hash)."
)


class Migration(migrations.Migration):
    dependencies = [
        ("evaluation", "0026_hash_scheme_heights"),
    ]

    operations = [
        migrations.AlterField(
            model_name="benchmarksplit",
            name="hash_scheme",
            field=models.CharField(
                default="repeats",
                help_text=HELP,
                max_length=8,
            ),
        ),
    ]
