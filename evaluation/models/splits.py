"""Benchmark splits (frozen ground truth, a correction is a new revision) and where
their images are.
"""

from django.db import models

from ..storage import split_path


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
        default="corners",
        help_text="How its content hash (sha256) was taken: corners (as repeats, and a "
        "corner file's corners as read where some x1 + w is not the x2 given, which voc, "
        "voc07 and kitti2d measure overlap on: a VOC XML, CSV or KITTI split and its COCO "
        "JSON twin hash apart), repeats (as heights, and the "
        "annotations of a repeated annotation id as given, which voc, voc07, kitti2d and "
        "the toolbox's miss rates read where pycocotools reads copies of the last: two "
        "files differing in an annotation a later one with its id replaces hash apart: "
        "splits frozen before corners as read were hashed keep that hash), "
        "heights (as named, and annotations' own height keys that differ from their box's "
        "h, which miss-rate-cityscale reads: splits frozen before repeated ids as given "
        "were hashed keep that hash), named (as typed, and categories sharing a name hash "
        "their own names, so two categories named car and a file naming them 'car (id 1)', "
        "'car (id 2)' hash apart: splits frozen before height keys were hashed keep that "
        "hash), typed (image and class ids that are not numbers hash with their kind, so "
        'ids 1 and "1" hash apart: splits frozen before own names were hashed keep that '
        "hash) or untyped (ids by their text only: splits frozen before keep that hash).",
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
