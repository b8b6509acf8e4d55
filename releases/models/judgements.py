"""Judgements of a candidate with their rule outcomes and notifications, and the
leads' sign-offs.
"""

from django.conf import settings
from django.db import models

from .detectors import BenchmarkSuite, ReleaseCriteria
from .versions import ModelVersion


class SignOff(models.Model):
    """A lead's decision on a candidate. An approved version becomes the baseline.

    One decision per version. Approving despite failing rules is an *override* and
    keeps its written justification forever.
    """

    class Decision(models.TextChoices):
        APPROVED = "approved"
        REJECTED = "rejected"

    version = models.OneToOneField(ModelVersion, on_delete=models.PROTECT, related_name="sign_off")
    decision = models.CharField(max_length=8, choices=Decision.choices)
    comment = models.TextField()
    override = models.BooleanField(default=False)
    justification = models.TextField(blank=True)
    failing_rules = models.JSONField(default=list)
    evidence = models.JSONField(help_text="Hashes and headline numbers the decision saw.")
    judgement = models.ForeignKey(
        "Judgement",
        null=True,
        blank=True,
        on_delete=models.PROTECT,
        related_name="+",
        help_text="The judgement the decision was made on.",
    )
    verdict = models.CharField(max_length=12, blank=True, help_text="Its verdict then.")
    decided_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+"
    )
    decided_at = models.DateTimeField()

    class Meta:
        indexes = [models.Index(fields=["decision", "decided_at"])]

    def __str__(self):
        return f"{self.version} {self.decision}{' (override)' if self.override else ''}"


class Judgement(models.Model):
    """One judging of a candidate: what it was judged against and what came out.

    Insert-only and kept forever; the version's newest judgement is its current one.
    ``evaluations`` is ``{evaluation id: state}`` of the current prediction sets the
    judge saw; a judgement is stale once those, the required splits (a new revision of a
    followed split), the criteria, the suite or the baseline changed
    (``releases.verdicts``).
    """

    class Verdict(models.TextChoices):
        INCOMPLETE = "incomplete"
        REGRESSION = "regression"
        PASS = "pass"

    version = models.ForeignKey(ModelVersion, on_delete=models.PROTECT, related_name="judgements")
    criteria = models.ForeignKey(
        ReleaseCriteria, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )
    suite = models.ForeignKey(
        BenchmarkSuite, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )
    baseline = models.ForeignKey(
        ModelVersion, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )
    evaluations = models.JSONField(help_text="{evaluation id: state} it saw.")
    required_splits = models.JSONField(
        default=list, help_text="Ids of the splits the suite required then."
    )
    baseline_evaluations = models.JSONField(
        default=dict,
        help_text="{evaluation id: state} of the baseline's sets it compared with.",
    )
    verdict = models.CharField(max_length=12, choices=Verdict.choices)
    reasons = models.JSONField(default=list)
    judged_at = models.DateTimeField()

    class Meta:
        ordering = ["version", "-id"]
        indexes = [models.Index(fields=["version", "-id"])]

    def __str__(self):
        return f"{self.version} judged {self.verdict} at {self.judged_at:%Y-%m-%d %H:%M}"

    def save(self, *args, **kwargs):
        if self.pk is not None:
            raise ValueError("a judgement is kept as recorded; judge again instead")
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        raise ValueError("a judgement is kept forever")


class Outcome(models.Model):
    """One rule judged for one candidate on one split, part of one judgement."""

    class Status(models.TextChoices):
        PASS = "pass"
        FAIL = "fail"
        MISSING = "missing"
        NOT_SIGNIFICANT = "not significant"
        NO_DATA = "no data"

    version = models.ForeignKey(ModelVersion, on_delete=models.PROTECT, related_name="outcomes")
    judgement = models.ForeignKey(
        Judgement, null=True, on_delete=models.PROTECT, related_name="outcomes"
    )
    criteria = models.ForeignKey(ReleaseCriteria, on_delete=models.PROTECT, related_name="outcomes")
    rule_index = models.PositiveSmallIntegerField()
    rule = models.JSONField()
    split = models.ForeignKey(
        "evaluation.BenchmarkSplit", on_delete=models.PROTECT, related_name="+"
    )
    class_name = models.CharField(max_length=64)
    status = models.CharField(max_length=16, choices=Status.choices)
    value = models.FloatField(null=True)
    baseline_value = models.FloatField(null=True)
    baseline = models.ForeignKey(
        ModelVersion, null=True, on_delete=models.PROTECT, related_name="+"
    )
    low = models.FloatField(null=True)
    high = models.FloatField(null=True)
    detail = models.TextField()
    judged_at = models.DateTimeField(auto_now_add=True)

    class Meta:
        ordering = ["version", "rule_index", "split", "class_name"]

    def __str__(self):
        return f"{self.version} rule {self.rule_index} on {self.split}: {self.status}"

    def save(self, *args, **kwargs):
        if self.pk is not None:
            raise ValueError("an outcome is kept as judged")
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        raise ValueError("an outcome is kept forever")


class Notification(models.Model):
    """Telling a team about one judgement: kept until delivered or given up.

    Created in the judgement's transaction; the task ``notify`` delivers it, and the
    beat sweep sends again any that is still pending past its time (a lost message, a
    killed worker), at most ``BENCHBOOK_WEBHOOK_ATTEMPTS`` attempts in all.
    """

    class State(models.TextChoices):
        PENDING = "pending"
        SENT = "sent"
        FAILED = "failed"

    version = models.ForeignKey(ModelVersion, on_delete=models.PROTECT, related_name="+")
    judgement = models.OneToOneField(
        Judgement, on_delete=models.PROTECT, related_name="notification"
    )
    state = models.CharField(max_length=8, choices=State.choices, default=State.PENDING)
    attempts = models.PositiveSmallIntegerField(default=0)
    emailed = models.BooleanField(default=False, help_text="The leads' e-mail went out.")
    last_error = models.TextField(blank=True)
    created_at = models.DateTimeField(auto_now_add=True)
    due_at = models.DateTimeField(help_text="When the next attempt may start.")
    finished_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        indexes = [models.Index(fields=["state", "due_at"])]

    def __str__(self):
        return f"notification of judgement {self.judgement_id} ({self.state})"
