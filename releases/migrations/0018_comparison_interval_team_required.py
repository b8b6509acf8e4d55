"""Comparison intervals: the team is required and part of the inputs' key."""

import django.db.models.deletion
from django.db import migrations, models


class Migration(migrations.Migration):
    dependencies = [("releases", "0017_comparison_intervals_per_team")]

    operations = [
        migrations.AlterField(
            model_name="comparisoninterval",
            name="team",
            field=models.ForeignKey(
                on_delete=django.db.models.deletion.PROTECT,
                related_name="+",
                to="releases.team",
            ),
        ),
        migrations.AddConstraint(
            model_name="comparisoninterval",
            constraint=models.UniqueConstraint(
                fields=[
                    "team",
                    "reference_predictions",
                    "candidate_predictions",
                    "split",
                    "protocol",
                    "confidence",
                    "resamples",
                    "seed",
                ],
                name="one_interval_per_input",
            ),
        ),
    ]
