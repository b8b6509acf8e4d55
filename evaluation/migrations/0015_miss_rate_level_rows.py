"""Level rows for the miss-rate setups' scorecards finished before ``SliceScore`` had a
``miss_rate`` column: one row per setup × class ('' = the setup's mean), the value
copied from the scorecard's stored result (``result["levels"]``), as
``evaluation.levels.level_rows`` writes them now."""

from django.db import migrations


def add_rows(apps, schema_editor):
    Scorecard = apps.get_model("evaluation", "Scorecard")
    SliceScore = apps.get_model("evaluation", "SliceScore")
    cards = Scorecard.objects.filter(result__kind="levels", result__metric="miss_rate")
    for card in cards.exclude(slices__kind="level").iterator():
        result, rows = card.result, []
        key = result["value_key"]
        for level, entry in result["levels"].items():
            rows.append((level, "", entry.get(key)))
            rows += [(level, c, row.get(key)) for c, row in entry["classes"].items()]
        SliceScore.objects.bulk_create(
            SliceScore(scorecard=card, kind="level", name=level, class_name=c, miss_rate=v)
            for level, c, v in rows
        )


class Migration(migrations.Migration):
    dependencies = [("evaluation", "0014_slice_miss_rate")]

    operations = [migrations.RunPython(add_rows, migrations.RunPython.noop)]
