"""Operational records of releases: notifications to deliver, audit verifications run.

Imported at the end of ``models.py`` (so they are models of this app).
"""

from django.db import models

from .models import Judgement, ModelVersion


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


class HistoryChange(models.Model):
    """One change to what a detector's history reads (a prediction set created,
    replaced or linked to evaluations, an evaluation of its sets finished), inserted in
    the change's own transaction by ``releases.history_stamps.changed``. Rows are only
    added: their count and newest id per detector are the stamp that keys the cached
    history numbers. A plain id, not a foreign key: the insert then locks no detector
    row (a foreign key check would wait for ``suites.set_suite``'s lock on it while
    holding the audit chain's lock that ``set_suite`` waits for)."""

    detector_id = models.BigIntegerField(db_index=True)

    def __str__(self):
        return f"history change {self.pk} of detector {self.detector_id}"
