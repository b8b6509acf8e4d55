"""Paired-bootstrap intervals of ΔAP computed on request for a compared pair."""

from django.conf import settings
from django.db import models

from .teams import Team
from .versions import ModelVersion


class ComparisonInterval(models.Model):
    """Paired-bootstrap intervals of ΔAP (candidate − reference) on one split, computed
    on request for a pair that no judgement covered (``releases/comparisons.py``).

    Keyed by the exact inputs: both prediction files, the protocol and the bootstrap
    settings, so a replaced upload or another seed never reads a stale interval; and by
    the team, so identical bytes of another team never reveal that (or when, or by whom)
    an interval was computed.
    ``intervals`` is ``{tag or "": {class or "mean": [low, high]}}`` (None where the
    class has no ground truth under that tag); ``size_intervals`` the same per size
    bucket (``{}`` on rows computed before size slices were compared).
    """

    class State(models.TextChoices):
        QUEUED = "queued"
        DONE = "done"
        FAILED = "failed"

    reference = models.ForeignKey(ModelVersion, on_delete=models.PROTECT, related_name="+")
    candidate = models.ForeignKey(ModelVersion, on_delete=models.PROTECT, related_name="+")
    team = models.ForeignKey(Team, on_delete=models.PROTECT, related_name="+")
    split = models.ForeignKey(
        "evaluation.BenchmarkSplit", on_delete=models.PROTECT, related_name="+"
    )
    reference_predictions = models.ForeignKey(
        "evaluation.PredictionFile", on_delete=models.PROTECT, related_name="+"
    )
    candidate_predictions = models.ForeignKey(
        "evaluation.PredictionFile", on_delete=models.PROTECT, related_name="+"
    )
    protocol = models.CharField(max_length=32)
    confidence = models.FloatField()
    resamples = models.PositiveIntegerField()
    seed = models.BigIntegerField()
    state = models.CharField(max_length=8, choices=State.choices, default=State.QUEUED)
    intervals = models.JSONField(default=dict)
    size_intervals = models.JSONField(default=dict)
    error = models.TextField(blank=True)
    requested_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+"
    )
    requested_at = models.DateTimeField(auto_now_add=True)
    finished_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(
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
            )
        ]

    def __str__(self):
        return f"Δ {self.candidate} − {self.reference} on {self.split} ({self.state})"
