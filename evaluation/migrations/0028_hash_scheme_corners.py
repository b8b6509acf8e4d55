from django.db import migrations, models

# Splits stored before this migration keep the scheme they were frozen with ("repeats",
# "heights", "named", "typed" or "untyped"), so their sha256 is never rewritten and still
# verifies (a split given as corners did not hash the corners as read); new splits are
# hashed "corners" (the new default), which hashes them where some x1 + w is not the x2
# read, since voc, voc07 and kitti2d measure overlap on the corners as read (engine
# 2.23.0). A split without such corners hashes alike under "corners" and "repeats".


HELP = (
    "How its content hash (sha256) was taken: corners (as repeats, and a "
    "corner file's corners as read where some x1 + w is not the x2 given, which voc, "
    "voc07 and kitti2d measure overlap on: a VOC XML, CSV or KITTI split and its COCO "
    "JSON twin hash apart), repeats (as heights, and the "
    "annotations of a repeated annotation id as given, which voc, voc07, kitti2d and "
    "the toolbox's miss rates read where pycocotools reads copies of the last: two "
    "files differing in an annotation a later one with its id replaces hash apart: "
    "splits frozen before corners as read were hashed keep that hash), "
    "heights (as named, and annotations' own height keys that differ from their box's "
    "h, which miss-rate-cityscale reads: splits frozen before repeated ids as given "
    "were hashed keep that hash), named (as typed, and categories sharing a name hash "
    "their own names, so two categories named car and a file naming them 'car (id 1)', "
    "'car (id 2)' hash apart: splits frozen before height keys were hashed keep that "
    "hash), typed (image and class ids that are not numbers hash with their kind, so "
    'ids 1 and "1" hash apart: splits frozen before own names were hashed keep that '
    "hash) or untyped (ids by their text only: splits frozen before keep that hash)."
)


class Migration(migrations.Migration):
    dependencies = [
        ("evaluation", "0027_hash_scheme_repeats"),
    ]

    operations = [
        migrations.AlterField(
            model_name="benchmarksplit",
            name="hash_scheme",
            field=models.CharField(
                default="corners",
                help_text=HELP,
                max_length=8,
            ),
        ),
    ]
