"""Detectors and what their candidates are judged by: release criteria and benchmark
suites, each versioned (a change is a new row).
"""

from django.conf import settings
from django.db import models

from evaluation.models import Evaluation

from .teams import Team


class Detector(models.Model):
    """A model line, e.g. the forward camera detector, with its class list."""

    team = models.ForeignKey(Team, on_delete=models.PROTECT, related_name="detectors")
    name = models.CharField(max_length=100)
    slug = models.SlugField(max_length=100)
    description = models.TextField(blank=True)
    classes = models.JSONField()
    primary_protocol = models.CharField(max_length=32, default="coco")
    protocols = models.JSONField(default=list, help_text="Protocols every upload is scored under.")
    webhook_url = models.URLField(blank=True, help_text="Receives each judgement as signed JSON.")
    webhook_secret = models.CharField(max_length=128, blank=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["team", "slug"], name="detector_slug_per_team")
        ]

    def __str__(self):
        return self.name


class ReleaseCriteria(models.Model):
    """One version of a detector's release rules; a change is a new row (audited)."""

    detector = models.ForeignKey(Detector, on_delete=models.PROTECT, related_name="criteria")
    number = models.PositiveIntegerField()
    rules = models.JSONField()
    created_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+"
    )
    created_at = models.DateTimeField(auto_now_add=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["detector", "number"], name="criteria_number_unique")
        ]
        ordering = ["detector", "-number"]

    def __str__(self):
        return f"{self.detector} criteria v{self.number}"


class BenchmarkSuite(models.Model):
    """One version of what a detector's candidates are scored on; a change is a new row.

    ``splits``: ``[{"name": "bay-night", "revision": null | 2}]`` (null follows the
    newest revision); ``protocols``: preset names, the first is the primary one that
    the criteria read; ``class_thresholds``: ``{class: score}`` overriding
    ``score_threshold`` (the deployed confidence cut).
    """

    class BoxPolicy(models.TextChoices):
        KEEP = "keep"
        CLIP = "clip"
        REJECT = "reject"

    detector = models.ForeignKey(Detector, on_delete=models.PROTECT, related_name="suites")
    number = models.PositiveIntegerField()
    splits = models.JSONField()
    protocols = models.JSONField()
    box_policy = models.CharField(max_length=8, choices=BoxPolicy.choices, default="keep")

    UnknownClasses = Evaluation.UnknownClasses  # one set for suites and evaluations

    unknown_classes = models.CharField(
        max_length=8,
        choices=UnknownClasses.choices,
        default=UnknownClasses.DROP,
        help_text="Detections of classes a split does not list: drop (as pycocotools; "
        "counted and named) or reject (the upload is refused).",
    )
    score_threshold = models.FloatField(default=0.5)
    class_thresholds = models.JSONField(default=dict, blank=True)
    created_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, on_delete=models.PROTECT, related_name="+"
    )
    created_at = models.DateTimeField(auto_now_add=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["detector", "number"], name="suite_number_unique")
        ]
        ordering = ["detector", "-number"]

    def __str__(self):
        return f"{self.detector} suite v{self.number}"
