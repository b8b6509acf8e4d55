"""Teams, detectors, model versions and their prediction sets."""

from django.conf import settings
from django.db import models

from evaluation.models import Evaluation


class Team(models.Model):
    name = models.CharField(max_length=100, unique=True)
    slug = models.SlugField(max_length=100, unique=True)

    def __str__(self):
        return self.name


class Membership(models.Model):
    class Role(models.TextChoices):
        ENGINEER = "engineer"
        LEAD = "lead"
        REVIEWER = "reviewer"

    team = models.ForeignKey(Team, on_delete=models.CASCADE, related_name="memberships")
    user = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.CASCADE, related_name="memberships"
    )
    role = models.CharField(max_length=8, choices=Role.choices)

    class Meta:
        constraints = [models.UniqueConstraint(fields=["team", "user"], name="one_role_per_team")]

    def __str__(self):
        return f"{self.user} ({self.role}) in {self.team}"


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


class ApiToken(models.Model):
    """A personal API token. Only its SHA-256 is kept; the token is shown once.

    Tokens are 256 random bits, so a plain hash (no salt, no slow KDF) is enough to
    make a leaked table useless while keeping lookup one indexed query (common practice).
    """

    user = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.CASCADE, related_name="api_tokens"
    )
    name = models.CharField(max_length=100, help_text="What the token is for, e.g. the CI job.")
    prefix = models.CharField(max_length=12, help_text="The token's first characters, to tell.")
    digest = models.CharField(max_length=64, unique=True)
    created_at = models.DateTimeField(auto_now_add=True)
    last_used_at = models.DateTimeField(null=True, blank=True)
    revoked_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        ordering = ["-created_at"]

    def __str__(self):
        return f"{self.prefix}… ({self.name}) of {self.user}"

    @property
    def active(self):
        return self.revoked_at is None


class ComparisonInterval(models.Model):
    """Paired-bootstrap intervals of ΔAP (candidate − reference) on one split, computed
    on request for a pair that no judgement covered (``releases/comparisons.py``).

    Keyed by the exact inputs: both prediction files, the protocol and the bootstrap
    settings, so a replaced upload or another seed never reads a stale interval; and by
    the team, so identical bytes of another team never reveal that (or when, or by whom)
    an interval was computed.
    ``intervals`` is ``{tag or "": {class or "mean": [low, high]}}`` (None where the
    class has no ground truth under that tag); ``size_intervals`` the same per size
    bucket (``{}`` on rows computed before size slices were compared).
    """

    class State(models.TextChoices):
        QUEUED = "queued"
        DONE = "done"
        FAILED = "failed"

    reference = models.ForeignKey(ModelVersion, on_delete=models.PROTECT, related_name="+")
    candidate = models.ForeignKey(ModelVersion, on_delete=models.PROTECT, related_name="+")
    team = models.ForeignKey(Team, on_delete=models.PROTECT, related_name="+")
    split = models.ForeignKey(
        "evaluation.BenchmarkSplit", on_delete=models.PROTECT, related_name="+"
    )
    reference_predictions = models.ForeignKey(
        "evaluation.PredictionFile", on_delete=models.PROTECT, related_name="+"
    )
    candidate_predictions = models.ForeignKey(
        "evaluation.PredictionFile", on_delete=models.PROTECT, related_name="+"
    )
    protocol = models.CharField(max_length=32)
    confidence = models.FloatField()
    resamples = models.PositiveIntegerField()
    seed = models.BigIntegerField()
    state = models.CharField(max_length=8, choices=State.choices, default=State.QUEUED)
    intervals = models.JSONField(default=dict)
    size_intervals = models.JSONField(default=dict)
    error = models.TextField(blank=True)
    requested_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+"
    )
    requested_at = models.DateTimeField(auto_now_add=True)
    finished_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(
                fields=[
                    "team",
                    "reference_predictions",
                    "candidate_predictions",
                    "split",
                    "protocol",
                    "confidence",
                    "resamples",
                    "seed",
                ],
                name="one_interval_per_input",
            )
        ]

    def __str__(self):
        return f"Δ {self.candidate} − {self.reference} on {self.split} ({self.state})"


from .ops_models import (  # noqa: E402, F401  (models of this app)
    AuditVerification,
    HistoryChange,
    Notification,
)
