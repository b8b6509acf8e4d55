"""What the API returns and accepts. Outputs are read-only views of the models;
inputs are checked here for shape, then the services decide."""

from rest_framework import serializers

from evaluation.models import BenchmarkSplit, Evaluation

from ..models import (
    AuditEvent,
    BenchmarkSuite,
    Detector,
    Judgement,
    ModelVersion,
    Outcome,
    PredictionSet,
    ReleaseCriteria,
)
from ..models import SignOff as SignOffModel

# Outputs ---------------------------------------------------------------------------


class DetectorSerializer(serializers.ModelSerializer):
    team = serializers.CharField(source="team.name")
    baseline = serializers.SerializerMethodField()

    class Meta:
        model = Detector
        fields = [
            "id",
            "name",
            "slug",
            "team",
            "description",
            "classes",
            "protocols",
            "primary_protocol",
            "baseline",
        ]

    def get_baseline(self, detector) -> int | None:
        return self.context.get("baselines", {}).get(detector.pk)


class SplitSerializer(serializers.ModelSerializer):
    left_out = serializers.SerializerMethodField(
        help_text="What the reference reading left out of the split, in words"
    )

    class Meta:
        model = BenchmarkSplit
        fields = [
            "id",
            "name",
            "revision",
            "description",
            "classes",
            "class_counts",
            "tags",
            "image_count",
            "box_count",
            "sha256",
            "source_format",
            "annotation_policy",
            "vis_ratio_reading",
            "hash_scheme",
            "annotations_left_out",
            "left_out",
            "created_by",
            "frozen_at",
        ]

    def get_left_out(self, split) -> list[str]:
        from evaluation import left_out

        return left_out.of_split(split)


class SignOffSerializer(serializers.ModelSerializer):
    version = serializers.IntegerField(source="version_id")
    judgement = serializers.IntegerField(
        source="judgement_id", allow_null=True, help_text="The judgement the decision saw"
    )
    decided_by = serializers.CharField(source="decided_by.username")

    class Meta:
        model = SignOffModel
        fields = [
            "id",
            "version",
            "decision",
            "comment",
            "override",
            "justification",
            "verdict",
            "judgement",
            "failing_rules",
            "evidence",
            "decided_by",
            "decided_at",
        ]


class VersionSerializer(serializers.ModelSerializer):
    detector = serializers.IntegerField(source="detector_id")
    created_by = serializers.CharField(source="created_by.username")
    state = serializers.SerializerMethodField(
        help_text="baseline, signed off, rejected, blocked (newest judgement: regression or "
        "incomplete) or candidate"
    )
    sign_off = serializers.SerializerMethodField()

    class Meta:
        model = ModelVersion
        fields = [
            "id",
            "detector",
            "label",
            "source_commit",
            "training_ref",
            "notes",
            "created_by",
            "created_at",
            "judged_at",
            "state",
            "sign_off",
        ]

    def get_state(self, version) -> str:
        return self.context["states"][version.pk]

    def get_sign_off(self, version) -> SignOffSerializer(allow_null=True):
        decision = getattr(version, "sign_off", None)
        return SignOffSerializer(decision).data if decision else None


class EvaluationSerializer(serializers.ModelSerializer):
    split = serializers.IntegerField(source="split_id")
    split_name = serializers.CharField(source="split.__str__")
    predictions_sha256 = serializers.CharField(source="predictions.sha256")
    error = serializers.SerializerMethodField()

    class Meta:
        model = Evaluation
        fields = [
            "id",
            "split",
            "split_name",
            "protocol",
            "state",
            "progress",
            "attempts",
            "error",
            "error_detail",
            "engine_version",
            "predictions_sha256",
            "unknown_images",
            "unknown_classes",
            "queued_at",
            "started_at",
            "finished_at",
        ]

    def get_error(self, evaluation) -> str:
        return evaluation.error if evaluation.state == Evaluation.State.FAILED else ""


class PredictionSetSerializer(serializers.ModelSerializer):
    version = serializers.IntegerField(source="version_id")
    version_label = serializers.CharField(source="version.label")
    detector = serializers.IntegerField(source="version.detector_id")
    split = serializers.IntegerField(source="split_id")
    split_name = serializers.CharField(source="split.__str__")
    sha256 = serializers.CharField(source="predictions.sha256")
    size = serializers.IntegerField(source="predictions.size")
    uploaded_by = serializers.CharField(source="uploaded_by.username")
    rescored_from = serializers.IntegerField(
        source="rescored_from_id",
        allow_null=True,
        help_text="The set on an earlier revision whose stored file this one re-scored.",
    )
    rescored_by = serializers.CharField(source="rescored_by.username", allow_null=True)

    class Meta:
        model = PredictionSet
        fields = [
            "id",
            "version",
            "version_label",
            "detector",
            "split",
            "split_name",
            "sha256",
            "size",
            "file_name",
            "uploaded_by",
            "uploaded_at",
            "replaced_at",
            "replaced_by",
            "rescored_from",
            "rescored_by",
            "rescored_at",
        ]


class OutcomeSerializer(serializers.ModelSerializer):
    version = serializers.IntegerField(source="version_id")
    judgement = serializers.IntegerField(source="judgement_id", allow_null=True)
    rule_number = serializers.SerializerMethodField()
    criteria_version = serializers.IntegerField(source="criteria.number")
    split = serializers.IntegerField(source="split_id")
    split_name = serializers.CharField(source="split.__str__")
    baseline = serializers.IntegerField(source="baseline_id", allow_null=True)
    interval = serializers.SerializerMethodField()

    class Meta:
        model = Outcome
        fields = [
            "id",
            "version",
            "judgement",
            "rule_number",
            "criteria_version",
            "rule",
            "split",
            "split_name",
            "class_name",
            "status",
            "value",
            "baseline",
            "baseline_value",
            "interval",
            "detail",
            "judged_at",
        ]

    def get_rule_number(self, outcome) -> int:
        return outcome.rule_index + 1

    def get_interval(self, outcome) -> list[float] | None:
        return None if outcome.low is None else [outcome.low, outcome.high]


class SuiteSerializer(serializers.ModelSerializer):
    detector = serializers.IntegerField(source="detector_id")
    created_by = serializers.CharField(source="created_by.username", allow_null=True)
    required = serializers.SerializerMethodField(help_text="The splits required now, by id")

    class Meta:
        model = BenchmarkSuite
        fields = [
            "id",
            "detector",
            "number",
            "splits",
            "protocols",
            "box_policy",
            "unknown_classes",
            "score_threshold",
            "class_thresholds",
            "required",
            "created_by",
            "created_at",
        ]

    def get_required(self, suite) -> list[int]:
        from ..suites import resolve

        return [split.pk for split in resolve(suite.splits)]


class CriteriaSerializer(serializers.ModelSerializer):
    detector = serializers.IntegerField(source="detector_id")
    created_by = serializers.CharField(source="created_by.username")

    class Meta:
        model = ReleaseCriteria
        fields = ["id", "detector", "number", "rules", "created_by", "created_at"]


class AuditEventSerializer(serializers.ModelSerializer):
    class Meta:
        model = AuditEvent
        fields = [
            "id",
            "kind",
            "actor",
            "created_at",
            "subject",
            "payload",
            "payload_digest",
            "previous_hash",
            "hash",
        ]


class JudgementSerializer(serializers.ModelSerializer):
    version = serializers.IntegerField(source="version_id")
    criteria_version = serializers.IntegerField(source="criteria.number", allow_null=True)
    suite_version = serializers.IntegerField(source="suite.number", allow_null=True)
    baseline = serializers.IntegerField(source="baseline_id", allow_null=True)
    baseline_label = serializers.CharField(source="baseline.label", allow_null=True)

    class Meta:
        model = Judgement
        fields = [
            "id",
            "version",
            "verdict",
            "reasons",
            "criteria_version",
            "suite_version",
            "baseline",
            "baseline_label",
            "evaluations",
            "judged_at",
        ]


class VerdictSerializer(serializers.Serializer):
    version = serializers.IntegerField()
    state = serializers.ChoiceField(
        ["scoring", "judging", "incomplete", "regression", "pass"],
        help_text="scoring → judging → incomplete | regression | pass (final)",
    )
    final = serializers.BooleanField()
    no_criteria = serializers.BooleanField(help_text="Judged while the detector had no criteria")
    decided = serializers.BooleanField(help_text="Signed off: the verdict its decision saw")
    reasons = serializers.ListField(
        child=serializers.CharField(), help_text="Missing splits, failed evaluations, failing rules"
    )
    missing = serializers.ListField(
        child=serializers.CharField(), help_text="Required splits without scored predictions"
    )
    judgement = JudgementSerializer(allow_null=True)
    evaluations = EvaluationSerializer(many=True)
    outcome_counts = serializers.DictField(child=serializers.IntegerField())
    failing = OutcomeSerializer(many=True, help_text="Failing and missing outcomes")


class ErrorItemSerializer(serializers.Serializer):
    path = serializers.CharField(help_text="The field, e.g. rules[0].threshold; '' for the request")
    message = serializers.CharField()


class ErrorSerializer(serializers.Serializer):
    """The body of every refusal; for a bad file, ``file``, ``record`` and ``field`` say
    where in the file."""

    status = serializers.IntegerField()
    code = serializers.CharField()
    message = serializers.CharField()
    errors = ErrorItemSerializer(many=True)
    file = serializers.CharField(required=False)
    record = serializers.CharField(required=False)
    field = serializers.CharField(required=False)


# Inputs ----------------------------------------------------------------------------


class DetectorInput(serializers.Serializer):
    team = serializers.IntegerField(help_text="Team id; only its leads create detectors")
    name = serializers.CharField(max_length=100)
    classes = serializers.ListField(child=serializers.CharField(max_length=64), allow_empty=False)
    description = serializers.CharField(required=False, default="", allow_blank=True)
    suite = serializers.JSONField(
        help_text="The benchmark suite: splits, protocols, box_policy, unknown_classes, "
        "score_threshold, class_thresholds (as on the suite endpoint)"
    )


class VersionInput(serializers.Serializer):
    detector = serializers.IntegerField()
    label = serializers.CharField(max_length=64)
    source_commit = serializers.CharField(max_length=64, required=False, default="")
    training_ref = serializers.CharField(max_length=200, required=False, default="")
    notes = serializers.CharField(required=False, default="", allow_blank=True)


class PredictionSetInput(serializers.Serializer):
    """A version is named by its label and created if new (as by the upload page)."""

    detector = serializers.IntegerField()
    version = serializers.CharField(max_length=64, help_text="Version label")
    split = serializers.IntegerField()
    predictions = serializers.FileField(help_text="COCO-style results JSON or a CSV table")
    source_commit = serializers.CharField(max_length=64, required=False, default="")
    notes = serializers.CharField(required=False, default="", allow_blank=True)


class SplitInput(serializers.Serializer):
    name = serializers.SlugField(max_length=64)
    revision = serializers.IntegerField(min_value=1, max_value=2**31 - 1)
    truth = serializers.FileField(help_text="COCO-style JSON, or a boxes CSV")
    images = serializers.FileField(required=False, help_text="Images CSV, with a boxes CSV")
    description = serializers.CharField(required=False, default="", allow_blank=True)
    annotations = serializers.ChoiceField(
        ["reference", "strict"],
        required=False,
        help_text="reference (default): read as pycocotools does — annotations of unlisted "
        "images or categories left out, a repeated id resolved to its last annotation, all "
        "counted (annotations_left_out); strict: such files are refused",
    )


class SplitImagesInput(serializers.Serializer):
    archive = serializers.FileField(required=False, help_text="A zip of images by file_name")
    url_template = serializers.CharField(
        required=False,
        default="",
        allow_blank=True,
        max_length=500,
        help_text="e.g. https://images.example/{file_name}",
    )


class SignOffInput(serializers.Serializer):
    decision = serializers.ChoiceField(SignOffModel.Decision.values)
    comment = serializers.CharField()
    justification = serializers.CharField(required=False, default="", allow_blank=True)


class CriteriaInput(serializers.Serializer):
    rules = serializers.ListField(
        child=serializers.DictField(),
        allow_empty=False,
        help_text="Rules (releases/criteria.py): metric, class, split, kind (min_value, "
        "max_drop, no_significant_drop), threshold / tolerance / confidence, an optional tag "
        "or size; an optional level (a level or setup of the suite's level protocols, e.g. "
        "moderate or reasonable) takes every kind and a tag",
    )


class SuiteInput(serializers.Serializer):
    """Shape only; ``suites.validate_suite`` checks the content and names the field."""

    splits = serializers.ListField(
        child=serializers.JSONField(),
        allow_empty=False,
        help_text='[{"name": "bay-night", "revision": null (newest) or a number}], '
        'or "name" / "name:revision"',
    )
    protocols = serializers.ListField(
        child=serializers.JSONField(),
        required=False,
        help_text="Each a preset's name, a stored custom protocol's name, or a custom "
        'protocol\'s definition ({"name": "iou60", "base": "coco", "iou_thresholds": [0.6]}, '
        "stored under its name); the first is primary",
    )
    box_policy = serializers.ChoiceField(["keep", "clip", "reject"], required=False)
    unknown_classes = serializers.ChoiceField(
        Evaluation.UnknownClasses.choices,  # the models' set: one enum in the schema
        required=False,
        help_text="Detections of classes a split does not list: drop (default, as "
        "pycocotools; counted and named in the result) or reject (the upload is refused)",
    )
    score_threshold = serializers.FloatField(required=False, min_value=0, max_value=1)
    class_thresholds = serializers.DictField(
        child=serializers.FloatField(min_value=0, max_value=1), required=False
    )


class RescoreInput(serializers.Serializer):
    split = serializers.IntegerField(
        min_value=1,
        max_value=2**63 - 1,
        help_text="The revision (a split id) to re-score on; its name's earlier revisions "
        "are the sources.",
    )
    versions = serializers.ListField(
        child=serializers.IntegerField(min_value=1, max_value=2**63 - 1),
        required=False,
        allow_empty=False,
        help_text="Version ids (default: every version of the detector).",
    )
