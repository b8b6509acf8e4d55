"""Benchmark splits, stored prediction files, evaluations and their scorecards.

Nothing here knows about teams or model versions; ``releases`` links to these rows.
"""

from django.db import models

from .storage import predictions_path, split_path


class FrozenError(Exception):
    """A frozen benchmark split was asked to change."""


class BenchmarkSplit(models.Model):
    """A frozen ground-truth set. A corrected split is a new revision, never an edit.

    Frozen rows are refused UPDATE and DELETE by the database itself (a trigger, see
    migration 0002), not only by ``save``.
    """

    name = models.SlugField(max_length=64)
    revision = models.PositiveIntegerField()
    description = models.TextField(blank=True)
    classes = models.JSONField(help_text="Class names, in the split's order.")
    class_counts = models.JSONField(help_text="Counted boxes per class.")
    tags = models.JSONField(default=dict, help_text="Image tag -> number of images.")
    image_count = models.PositiveIntegerField()
    box_count = models.PositiveIntegerField()
    sha256 = models.CharField(max_length=64, unique=True, help_text="Of the canonical content.")
    source_format = models.CharField(max_length=8)
    truth_file = models.FileField(upload_to=split_path, max_length=255)
    images_file = models.FileField(upload_to=split_path, max_length=255, blank=True)
    road_counts = models.JSONField(
        null=True,
        blank=True,
        help_text="Boxes per difficulty level and attribute bucket, don't-care regions "
        "(evaluation.levels.split_counts), counted when frozen; None without attributes.",
    )
    annotation_policy = models.CharField(
        max_length=10,
        default="reference",
        help_text="How its annotations were read: reference (as pycocotools: a repeated id "
        "resolves to its last annotation, annotations of unlisted images or categories left "
        "out, counted) or strict (such files refused).",
    )
    vis_ratio_reading = models.CharField(
        max_length=8,
        default="as-given",
        help_text="How an annotation's vis_ratio key was read: as-given (as the city-scale "
        "evaluation script reads it, for miss-rate-cityscale: any number or boolean, over "
        "a visibility key too; counted), read (the visibility where visibility is absent, "
        "within 0-1: splits frozen with engines 2.9-2.10) or unread (skipped: splits "
        "frozen before it was read). Each keeps its splits' content hash.",
    )
    hash_scheme = models.CharField(
        max_length=8,
        default="named",
        help_text="How its content hash (sha256) was taken: named (as typed, and "
        "categories sharing a name hash their own names, so two categories named car "
        "and a file naming them 'car (id 1)', 'car (id 2)' hash apart), typed (image and "
        'class ids that are not numbers hash with their kind, so ids 1 and "1" hash '
        "apart: splits frozen before own names were hashed keep that hash) or untyped "
        "(ids by their text only: splits frozen before keep that hash).",
    )
    annotations_left_out = models.JSONField(
        default=dict,
        blank=True,
        help_text="What the reference reading left out or replaced (engine "
        "annotation_index.COUNTS); empty when nothing was.",
    )
    created_by = models.CharField(max_length=150, blank=True)
    created_at = models.DateTimeField(auto_now_add=True)
    frozen_at = models.DateTimeField()

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["name", "revision"], name="split_name_revision_unique")
        ]
        ordering = ["name", "revision"]

    def __str__(self):
        return f"{self.name} rev {self.revision}"

    def save(self, *args, **kwargs):
        if self.pk is not None:
            raise FrozenError(f"{self} is frozen; load a corrected split as a new revision")
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        raise FrozenError(f"{self} is frozen and cannot be deleted")


class PredictionFile(models.Model):
    """A predictions file as uploaded: the same bytes are stored once (by SHA-256)."""

    file = models.FileField(upload_to=predictions_path, max_length=255)
    sha256 = models.CharField(max_length=64, unique=True)
    size = models.BigIntegerField()
    original_name = models.CharField(max_length=255)
    record_count = models.PositiveIntegerField(null=True, blank=True)
    uploaded_at = models.DateTimeField(auto_now_add=True)

    def __str__(self):
        return f"{self.original_name} ({self.sha256[:12]})"


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


class StoredProtocol(models.Model):
    """A custom protocol a benchmark suite may name: its definition (the engine's
    ``protocol_from_dict`` keys), kept as stored. A name always means the same
    definition (append-only: a changed protocol is stored under a new name), so an
    evaluation's ``protocol`` column stays an exact reference."""

    name = models.CharField(max_length=32, unique=True)
    definition = models.JSONField()
    sha256 = models.CharField(max_length=64, help_text="SHA-256 of the canonical definition.")
    created_by = models.CharField(max_length=150, blank=True)
    created_at = models.DateTimeField(auto_now_add=True)

    def __str__(self):
        return f"{self.name} (custom, {self.sha256[:12]})"


class SplitImages(models.Model):
    """Where a split's image files are: uploaded under the media storage (``files``,
    checked and stored under ``root``) or loaded by the browser from a URL template
    (``url``, e.g. ``https://images.example/{file_name}``). Optional: without it,
    boxes are drawn on an empty frame of the image's size. Images are never served
    from a public media URL (``frontend`` checks the reader's team first)."""

    class Source(models.TextChoices):
        FILES = "files"
        URL = "url"

    split = models.OneToOneField(BenchmarkSplit, on_delete=models.PROTECT, related_name="images")
    source = models.CharField(max_length=8, choices=Source.choices)
    root = models.CharField(max_length=255, blank=True, help_text="Storage prefix (files).")
    url_template = models.CharField(max_length=500, blank=True)
    file_count = models.PositiveIntegerField(default=0)
    created_by = models.CharField(max_length=150, blank=True)
    created_at = models.DateTimeField(auto_now_add=True)

    def __str__(self):
        return f"images of {self.split} ({self.source})"


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


class PredictionPieces(models.Model):
    """A predictions file cut into per-shard pieces for one split (``evaluation/pieces.py``):
    written once, when the file is validated at upload (or, for a file stored before, by
    the first sharded evaluation that needs them), and reused by every evaluation of the
    same file on the same split under the same policies and shard size.

    Created with all its ``PredictionPiece`` rows in one transaction, after every piece
    file is in the storage; each piece is checked against its SHA-256 when a shard reads
    it. ``counts`` are the whole file's (``engine.shards.PredictionCounts``).
    """

    predictions = models.ForeignKey(PredictionFile, on_delete=models.CASCADE, related_name="+")
    split = models.ForeignKey(BenchmarkSplit, on_delete=models.CASCADE, related_name="+")
    box_policy = models.CharField(max_length=8)
    unknown_images = models.CharField(max_length=8)
    unknown_classes = models.CharField(max_length=8, default="drop")
    images_per_shard = models.PositiveIntegerField()
    counts = models.JSONField(help_text="Counts of the whole predictions file.")
    created_at = models.DateTimeField(auto_now_add=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(
                fields=[
                    "predictions",
                    "split",
                    "box_policy",
                    "unknown_images",
                    "unknown_classes",
                    "images_per_shard",
                ],
                name="one_piece_set_per_input_and_policies",
            )
        ]

    def __str__(self):
        return (
            f"pieces of {self.predictions} on {self.split} "
            f"({self.images_per_shard} images per shard)"
        )


class PredictionPiece(models.Model):
    """One shard's piece of a ``PredictionPieces`` set: the truth slice and detections
    of images ``[image_start, image_stop)`` as one ``.npz`` (``engine.shards.save_piece``)."""

    pieces = models.ForeignKey(PredictionPieces, on_delete=models.CASCADE, related_name="pieces")
    index = models.PositiveIntegerField()
    image_start = models.PositiveIntegerField()
    image_stop = models.PositiveIntegerField()
    detections = models.PositiveIntegerField()
    file = models.FileField(upload_to="pieces/", max_length=255)
    sha256 = models.CharField(max_length=64)

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["pieces", "index"], name="one_piece_per_shard")
        ]

    def __str__(self):
        return f"piece {self.index} of {self.pieces_id}"
