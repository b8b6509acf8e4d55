"""Verdicts, judgements, their outcomes and evaluations, and sign-offs: what the API
returns and accepts.
"""

from rest_framework import serializers

from evaluation.models import Evaluation

from ...models import Judgement, Outcome
from ...models import SignOff as SignOffModel


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


class SignOffInput(serializers.Serializer):
    decision = serializers.ChoiceField(SignOffModel.Decision.values)
    comment = serializers.CharField()
    justification = serializers.CharField(required=False, default="", allow_blank=True)
