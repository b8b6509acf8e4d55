"""Scorecards of finished evaluations and what is stored with them: class and slice
rows, the error breakdown and the per-image leave-one-out AP.
"""

from django.db import models

from .evaluations import Evaluation


class Scorecard(models.Model):
    """The stored result of a finished evaluation, with everything needed to trust it."""

    evaluation = models.OneToOneField(
        Evaluation, on_delete=models.PROTECT, related_name="scorecard"
    )
    protocol = models.CharField(max_length=32)
    protocol_version = models.PositiveIntegerField()
    engine_version = models.CharField(max_length=16)
    split_sha256 = models.CharField(max_length=64)
    predictions_sha256 = models.CharField(max_length=64)
    summary = models.JSONField()
    result = models.JSONField(help_text="The engine's full result: per class, curves, slices.")
    records = models.FileField(upload_to="records/", max_length=255)
    records_sha256 = models.CharField(
        max_length=64, null=True, blank=True, help_text="Of the records file (None before kept)."
    )
    created_at = models.DateTimeField(auto_now_add=True)

    def __str__(self):
        return f"scorecard of {self.evaluation}"


class ErrorBreakdown(models.Model):
    """TIDE's error breakdown of a scorecard (``evaluation/breakdowns.py``), stored at
    scoring time or on first use for older scorecards; append-only."""

    scorecard = models.OneToOneField(
        Scorecard, on_delete=models.CASCADE, related_name="error_breakdown"
    )
    records_sha256 = models.CharField(max_length=64, help_text="Of the records it came from.")
    engine_version = models.CharField(max_length=16)
    breakdown = models.JSONField()
    created_at = models.DateTimeField(auto_now_add=True)

    def __str__(self):
        return f"error breakdown of {self.scorecard}"


class ImageLeaveOneOut(models.Model):
    """Each image's leave-one-out AP per class of a scorecard (``evaluation/image_loo.py``),
    computed by the worker when it stores the result so the per-image list reads it:
    one ``.npz`` member per (tag, size bucket, metric), each member's SHA-256 in
    ``members``; append-only. One row per scorecard, engine version and layout: a
    newer engine adds its row beside the old one (``loo_fill``)."""

    scorecard = models.ForeignKey(
        Scorecard, on_delete=models.CASCADE, related_name="leave_one_out_files"
    )
    records_sha256 = models.CharField(max_length=64, help_text="Of the records it came from.")
    engine_version = models.CharField(max_length=16)
    format = models.PositiveSmallIntegerField(help_text="Layout of the file (image_loo.FORMAT).")
    file = models.FileField(upload_to="leave-one-out/", max_length=255)
    members = models.JSONField(
        help_text='{"metric|size|tag": {"member": name, "sha256": of its bytes}}'
    )
    created_at = models.DateTimeField(auto_now_add=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(
                fields=["scorecard", "engine_version", "format"],
                name="one_leave_one_out_file_per_engine_version",
            )
        ]

    def __str__(self):
        return f"leave-one-out AP per image of {self.scorecard}"


class ClassScore(models.Model):
    """One class of one scorecard, as a row, so trends are plain SQL."""

    scorecard = models.ForeignKey(Scorecard, on_delete=models.CASCADE, related_name="classes")
    class_name = models.CharField(max_length=64)
    ap = models.FloatField(null=True)
    ap50 = models.FloatField(null=True)
    ap75 = models.FloatField(null=True)
    recall = models.FloatField(null=True)
    gt = models.FloatField()
    tp = models.FloatField()
    fp = models.FloatField()
    best_f1 = models.FloatField(null=True)
    best_f1_threshold = models.FloatField(null=True)
    miss_rate = models.FloatField(null=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["scorecard", "class_name"], name="one_row_per_class")
        ]


class SliceScore(models.Model):
    """The rule metrics of one slice (image tag, size bucket, or a level protocol's
    level or setup: kind ``level``, its AP — or its log-average miss rate in
    ``miss_rate`` for a lower-is-better setup), for the mean ('' class) or a class.
    ``all_metrics`` is False on rows stored before AP50, AP75 and recall were kept per
    slice (those columns are then unknown, not absent): readers compute them from the
    match records (``evaluation.slices``)."""

    class Kind(models.TextChoices):
        TAG = "tag"
        SIZE = "size"
        LEVEL = "level"

    scorecard = models.ForeignKey(Scorecard, on_delete=models.CASCADE, related_name="slices")
    kind = models.CharField(max_length=8, choices=Kind.choices)
    name = models.CharField(max_length=64)
    class_name = models.CharField(max_length=64, blank=True)
    ap = models.FloatField(null=True)
    ap50 = models.FloatField(null=True)
    ap75 = models.FloatField(null=True)
    recall = models.FloatField(null=True)
    miss_rate = models.FloatField(null=True)
    all_metrics = models.BooleanField(default=False)
    images = models.PositiveIntegerField(null=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(
                fields=["scorecard", "kind", "name", "class_name"], name="one_row_per_slice"
            )
        ]
