"""Model versions and their prediction sets: what the API returns and accepts."""

from rest_framework import serializers

from ...models import ModelVersion, PredictionSet
from .judgements import SignOffSerializer


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
