"""Comparison intervals belong to the team that asked for them (no cross-team reuse).

The field is filled here and made required in 0018: on PostgreSQL, altering a table
in the transaction that updated its rows fails on pending deferred-constraint checks.
"""

import django.db.models.deletion
from django.db import migrations, models


def teams_from_candidates(apps, schema_editor):
    ComparisonInterval = apps.get_model("releases", "ComparisonInterval")
    for row in ComparisonInterval.objects.select_related("candidate__detector"):
        row.team_id = row.candidate.detector.team_id
        row.save(update_fields=["team"])


class Migration(migrations.Migration):
    dependencies = [("releases", "0016_notifications_and_audit_verifications")]

    operations = [
        migrations.RemoveConstraint(model_name="comparisoninterval", name="one_interval_per_input"),
        migrations.AddField(
            model_name="comparisoninterval",
            name="team",
            field=models.ForeignKey(
                null=True,
                on_delete=django.db.models.deletion.PROTECT,
                related_name="+",
                to="releases.team",
            ),
        ),
        migrations.RunPython(teams_from_candidates, migrations.RunPython.noop),
    ]
