"""Model versions of a detector and their prediction sets (one upload per split)."""

from django.conf import settings
from django.db import models

from .detectors import Detector


class ModelVersion(models.Model):
    """One trained model of a detector."""

    detector = models.ForeignKey(Detector, on_delete=models.PROTECT, related_name="versions")
    label = models.CharField(max_length=64)
    source_commit = models.CharField(max_length=64, blank=True)
    training_ref = models.CharField(max_length=200, blank=True)
    notes = models.TextField(blank=True)
    created_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+"
    )
    created_at = models.DateTimeField()
    judged_at = models.DateTimeField(
        null=True, blank=True, help_text="When the criteria were last applied to it."
    )

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["detector", "label"], name="version_label_unique")
        ]
        ordering = ["detector", "created_at"]

    def __str__(self):
        return f"{self.detector} {self.label}"


class PredictionSetQuerySet(models.QuerySet):
    def current(self):
        """The sets that count for their version: at most one per version x split
        (the database enforces it). Read a version's predictions only through this;
        replaced sets are history (kept, with their files and errors)."""
        return self.filter(replaced_at__isnull=True)


class PredictionSet(models.Model):
    """A version's predictions on one benchmark split, as one upload.

    File name, uploader and time belong to the set, not to the stored bytes: two
    uploads of identical bytes share one ``PredictionFile`` and nothing else. A set
    whose evaluations failed can be replaced by a new upload; it is then kept as
    history with ``replaced_at`` / ``replaced_by`` set.
    """

    objects = PredictionSetQuerySet.as_manager()

    version = models.ForeignKey(
        ModelVersion, on_delete=models.PROTECT, related_name="prediction_sets"
    )
    split = models.ForeignKey(
        "evaluation.BenchmarkSplit", on_delete=models.PROTECT, related_name="+"
    )
    predictions = models.ForeignKey(
        "evaluation.PredictionFile", on_delete=models.PROTECT, related_name="+"
    )
    uploaded_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+"
    )
    uploaded_at = models.DateTimeField(auto_now_add=True)
    file_name = models.CharField(
        max_length=255, default="", help_text="The file's name in this upload."
    )
    replaced_at = models.DateTimeField(null=True, blank=True)
    replaced_by = models.OneToOneField(
        "self", null=True, blank=True, on_delete=models.PROTECT, related_name="replaces"
    )
    evaluations = models.ManyToManyField(
        "evaluation.Evaluation",
        related_name="prediction_sets",
        blank=True,
        help_text="The evaluations this upload asked for.",
    )
    # A re-scored set (``releases.rescore``): the stored file of ``rescored_from`` (a
    # set on an earlier revision of the split) scored on this one; ``uploaded_by`` and
    # ``uploaded_at`` stay the original upload's.
    rescored_from = models.ForeignKey(
        "self", null=True, blank=True, on_delete=models.PROTECT, related_name="rescored_as"
    )
    rescored_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT, related_name="+"
    )
    rescored_at = models.DateTimeField(null=True, blank=True)

    @property
    def rescored(self):
        return self.rescored_from_id is not None

    @property
    def unknown_images(self):
        """The image policy of this set's evaluations: a re-scored file drops the
        detections of images its new revision no longer holds; an upload never does."""
        return "drop" if self.rescored else "reject"

    class Meta:
        constraints = [
            models.UniqueConstraint(
                fields=["version", "split"],
                condition=models.Q(replaced_at__isnull=True),
                name="one_current_set_per_split",
            )
        ]

    def __str__(self):
        return f"{self.version} on {self.split}"
