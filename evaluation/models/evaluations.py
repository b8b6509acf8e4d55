"""Evaluations (one file scored on one split under one protocol, per scope) and the
image shards and class groups a large one is scored in.
"""

from django.db import models

from .predictions import PredictionFile
from .splits import BenchmarkSplit


class Evaluation(models.Model):
    """Scoring one prediction file on one split under one protocol, for one ``scope``.

    ``scope`` is an opaque key of whoever asked (``releases`` uses its team): the same
    bytes, split, protocol and box policy are evaluated once per scope, so no requester
    ever sees another's queue or finish times, attempts or messages. This app never
    reads its meaning.
    """

    class State(models.TextChoices):
        QUEUED = "queued"
        RUNNING = "running"
        DONE = "done"
        FAILED = "failed"

    split = models.ForeignKey(BenchmarkSplit, on_delete=models.PROTECT, related_name="evaluations")
    predictions = models.ForeignKey(
        PredictionFile, on_delete=models.PROTECT, related_name="evaluations"
    )
    protocol = models.CharField(max_length=32)
    box_policy = models.CharField(
        max_length=8,
        default="keep",
        help_text="Boxes leaving the frame: keep (as the references), clip or reject.",
    )

    class UnknownImages(models.TextChoices):
        REJECT = "reject"
        DROP = "drop"

    scope = models.CharField(
        max_length=64,
        blank=True,
        default="",
        help_text="Who asked for it (opaque here); never shared across scopes.",
    )
    unknown_images = models.CharField(
        max_length=8,
        choices=UnknownImages.choices,
        default=UnknownImages.REJECT,
        help_text="Detections of images outside the split: reject (every upload) or drop "
        "(a stored file re-scored on a later revision; counted in the result).",
    )
    file_name = models.CharField(
        max_length=255,
        blank=True,
        default="",
        help_text="The file's name as its requester uploaded it (messages, format).",
    )

    class UnknownClasses(models.TextChoices):
        DROP = "drop"
        REJECT = "reject"

    unknown_classes = models.CharField(
        max_length=8,
        choices=UnknownClasses.choices,
        default=UnknownClasses.DROP,
        help_text="Detections of classes the split does not list: drop (as pycocotools, "
        "never scored; counted and named in the result) or reject (the file is refused).",
    )
    state = models.CharField(max_length=8, choices=State.choices, default=State.QUEUED)
    progress = models.PositiveSmallIntegerField(default=0)
    attempts = models.PositiveSmallIntegerField(default=0)
    error = models.TextField(blank=True)
    error_detail = models.JSONField(null=True, blank=True)
    engine_version = models.CharField(max_length=16, blank=True)
    claimed_by = models.CharField(max_length=64, blank=True, help_text="Task delivery scoring it.")
    lease_expires_at = models.DateTimeField(
        null=True, blank=True, help_text="The claim holder renews this while it scores."
    )
    created_at = models.DateTimeField(auto_now_add=True)
    queued_at = models.DateTimeField(auto_now_add=True)
    started_at = models.DateTimeField(null=True, blank=True)
    finished_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(
                fields=[
                    "split",
                    "predictions",
                    "protocol",
                    "box_policy",
                    "scope",
                    "unknown_images",
                    "unknown_classes",
                ],
                name="one_evaluation_per_input_policies_and_scope",
            )
        ]
        indexes = [models.Index(fields=["state", "queued_at"])]

    def __str__(self):
        return f"{self.protocol} of {self.predictions} on {self.split} ({self.state})"

    @property
    def name(self):
        """The predictions file's name for messages: the requester's, not whoever
        stored the bytes first."""
        return self.file_name or self.predictions.original_name

    @property
    def finished(self):
        return self.state in (self.State.DONE, self.State.FAILED)


class EvaluationShard(models.Model):
    """One image shard of a large evaluation (``evaluation/sharding.py``): its input
    ``piece`` (the truth and predictions of images ``[image_start, image_stop)`` as
    columns, written once when the file is read) and, once matched, its ``records``.

    One row per (evaluation, index): a retried shard replaces its records, never adds
    a second set. Rows and files are removed when the merged result is stored.
    """

    evaluation = models.ForeignKey(Evaluation, on_delete=models.CASCADE, related_name="shards")
    index = models.PositiveIntegerField()
    image_start = models.PositiveIntegerField()
    image_stop = models.PositiveIntegerField()
    detections = models.PositiveIntegerField(help_text="Detections on the shard's images.")
    piece = models.FileField(upload_to="shards/", max_length=255, blank=True)
    piece_sha256 = models.CharField(max_length=64)
    predictions_counts = models.JSONField(help_text="Counts of the whole predictions file.")
    records = models.FileField(upload_to="shards/", max_length=255, blank=True)
    records_sha256 = models.CharField(max_length=64, blank=True)
    group_digests = models.JSONField(
        default=dict,
        blank=True,
        help_text="The class-group plan the records were cut by and each group's digest.",
    )
    seconds = models.FloatField(null=True, blank=True, help_text="Load, match and store.")
    finished_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["evaluation", "index"], name="one_row_per_shard")
        ]

    def __str__(self):
        return f"shard {self.index} of evaluation {self.evaluation_id}"


class EvaluationClassGroup(models.Model):
    """One run of classes ``[class_start, class_stop)`` of a sharded evaluation
    (``evaluation/class_groups.py``): read from every shard's records, merged and scored
    per class; its ``records`` hold that group's merged records and per-class parts.

    One row per (evaluation, index): a retried group replaces its file. Files are
    removed when the assembled result is stored; the rows stay with their timings.
    """

    evaluation = models.ForeignKey(
        Evaluation, on_delete=models.CASCADE, related_name="class_groups"
    )
    index = models.PositiveIntegerField()
    class_start = models.PositiveIntegerField()
    class_stop = models.PositiveIntegerField()
    detections = models.PositiveIntegerField(null=True, blank=True)
    records = models.FileField(upload_to="shards/", max_length=255, blank=True)
    records_sha256 = models.CharField(max_length=64, blank=True)
    seconds = models.FloatField(null=True, blank=True, help_text="Read, merge, score, store.")
    finished_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["evaluation", "index"], name="one_row_per_class_group")
        ]

    def __str__(self):
        return f"class group {self.index} of evaluation {self.evaluation_id}"
