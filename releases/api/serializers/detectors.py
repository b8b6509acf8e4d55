"""Detectors, their benchmark suites and release criteria: what the API returns and accepts."""

from rest_framework import serializers

from evaluation.models import Evaluation

from ...models import BenchmarkSuite, Detector, ReleaseCriteria


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
        from ...suites import resolve

        return [split.pk for split in resolve(suite.splits)]


class CriteriaSerializer(serializers.ModelSerializer):
    detector = serializers.IntegerField(source="detector_id")
    created_by = serializers.CharField(source="created_by.username")

    class Meta:
        model = ReleaseCriteria
        fields = ["id", "detector", "number", "rules", "created_by", "created_at"]


class DetectorInput(serializers.Serializer):
    team = serializers.IntegerField(help_text="Team id; only its leads create detectors")
    name = serializers.CharField(max_length=100)
    classes = serializers.ListField(child=serializers.CharField(max_length=64), allow_empty=False)
    description = serializers.CharField(required=False, default="", allow_blank=True)
    suite = serializers.JSONField(
        help_text="The benchmark suite: splits, protocols, box_policy, unknown_classes, "
        "score_threshold, class_thresholds (as on the suite endpoint)"
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
        child=serializers.FloatField(min_value=0, max_value=1),
        required=False,
        help_text="{class: score threshold}, overriding score_threshold; a key names one "
        "of the detector's classes in any case (Pedestrian = pedestrian)",
    )


class CriteriaInput(serializers.Serializer):
    rules = serializers.ListField(
        child=serializers.DictField(),
        allow_empty=False,
        help_text="Rules (releases/criteria.py): metric, class, split, kind (min_value, "
        "max_drop, no_significant_drop), threshold / tolerance / confidence, an optional tag "
        "or size; an optional level (a level or setup of the suite's level protocols, e.g. "
        "moderate or reasonable) takes every kind and a tag",
    )
