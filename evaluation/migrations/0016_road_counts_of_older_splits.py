"""Road counts (``BenchmarkSplit.road_counts``: boxes per difficulty level and
pedestrian setup, attribute buckets, don't-care regions) for splits frozen before the
counts were stored at freeze time. They are derived from the split's stored files,
which the content hash pins, so counting them now gives what freezing would have; the
frozen-split trigger is lifted for this one derived column and installed again (the
content, its hash and every other column stay as frozen)."""

from django.db import migrations


def count(apps, schema_editor):
    from evaluation import triggers
    from evaluation.services import road_counts_of

    BenchmarkSplit = apps.get_model("evaluation", "BenchmarkSplit")
    counted = {}
    for split in BenchmarkSplit.objects.filter(road_counts__isnull=True).iterator():
        counts = road_counts_of(split)
        if counts is not None:
            counted[split.pk] = counts
    if not counted:
        return
    triggers.remove(schema_editor.connection)
    try:
        for pk, counts in counted.items():
            BenchmarkSplit.objects.filter(pk=pk, road_counts__isnull=True).update(
                road_counts=counts
            )
    finally:
        triggers.install(schema_editor.connection)


class Migration(migrations.Migration):
    dependencies = [("evaluation", "0015_miss_rate_level_rows")]

    operations = [migrations.RunPython(count, migrations.RunPython.noop)]
