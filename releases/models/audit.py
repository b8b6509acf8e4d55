"""The audit trail (hash-chained, append-only) and the verifications run on it."""

from django.db import models


class AuditEvent(models.Model):
    """One append-only event of the audit trail, chained to the one before by hash.

    ``hash = SHA-256(previous_hash | kind | actor | time | subject | payload_digest)``;
    changing any stored field, or removing or reordering a row, breaks the chain from
    there on (``services.verify_audit``). The database refuses UPDATE and DELETE.
    """

    class Kind(models.TextChoices):
        SPLIT_FROZEN = "split frozen"
        PREDICTIONS_UPLOADED = "predictions uploaded"
        PREDICTIONS_REPLACED = "predictions replaced"
        PREDICTIONS_RESCORED = "predictions re-scored"
        EVALUATION_FINISHED = "evaluation finished"
        EVALUATION_FAILED = "evaluation failed"
        CRITERIA_CHANGED = "criteria changed"
        SUITE_CHANGED = "suite changed"
        JUDGED = "judged"
        SIGNED_OFF = "signed off"
        REJECTED = "rejected"
        OVERRIDE = "override"
        CONTENT_MISMATCH = "content mismatch"
        IMAGES_ATTACHED = "split images attached"

    kind = models.CharField(max_length=24, choices=Kind.choices)
    actor = models.CharField(max_length=150, help_text="Username, or 'system' for workers.")
    created_at = models.DateTimeField()
    subject = models.CharField(max_length=200)
    payload = models.JSONField()
    payload_digest = models.CharField(max_length=64)
    previous_hash = models.CharField(max_length=64)
    hash = models.CharField(max_length=64, unique=True)

    class Meta:
        ordering = ["id"]

    def __str__(self):
        return f"#{self.pk} {self.kind} {self.subject} by {self.actor}"


class AuditVerification(models.Model):
    """One full verification of the audit trail (``audit_check.check``): what was
    checked, when, by whom, and what it found. The audit page shows the newest."""

    checked_at = models.DateTimeField()
    checked_by = models.CharField(max_length=150)
    seconds = models.FloatField()
    ok = models.BooleanField()
    events = models.PositiveIntegerField()
    head = models.CharField(max_length=64, blank=True)
    broken = models.PositiveIntegerField(null=True, blank=True)
    results = models.PositiveIntegerField(help_text="Results re-derived from their rows.")
    judgements = models.PositiveIntegerField()
    decisions = models.PositiveIntegerField()
    head_file = models.CharField(max_length=500, blank=True, help_text="Checked against, if any.")
    problems = models.JSONField(default=list)
    notes = models.JSONField(default=list)

    class Meta:
        ordering = ["-checked_at"]

    def __str__(self):
        outcome = "ok" if self.ok else "findings"
        return f"audit verification {self.checked_at:%Y-%m-%d %H:%M} ({outcome})"
