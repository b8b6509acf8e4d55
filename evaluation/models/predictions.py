"""Stored predictions files (the same bytes once) and their per-shard pieces for a split."""

from django.db import models

from ..storage import predictions_path
from .splits import BenchmarkSplit


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
