"""The documented shape of ``GET /api/v1/detectors/<id>/history/`` (schema only)."""

from rest_framework import serializers


class HistoryVersion(serializers.Serializer):
    id = serializers.IntegerField()
    label = serializers.CharField()
    date = serializers.DateField()
    decision = serializers.CharField(
        allow_null=True, help_text="approved or rejected; null while undecided"
    )


class HistorySplit(serializers.Serializer):
    id = serializers.IntegerField()
    revision = serializers.IntegerField()


class HistorySeries(serializers.Serializer):
    name = serializers.CharField(help_text="Split name (joined) or 'name rev N' (separate)")
    splits = HistorySplit(many=True)
    values = serializers.ListField(
        child=serializers.FloatField(allow_null=True),
        help_text="Aligned with versions; null where not scored; four decimals",
    )
    revisions = serializers.ListField(
        child=serializers.IntegerField(allow_null=True),
        help_text="The split revision of each value (null where no value)",
    )
    box_policies = serializers.ListField(
        child=serializers.CharField(allow_null=True),
        help_text="The box policy each value was computed under (keep, clip, reject)",
    )
    engine_versions = serializers.ListField(
        child=serializers.CharField(allow_null=True),
        help_text="The engine version that computed each value",
    )


class HistoryChange(serializers.Serializer):
    series = serializers.CharField()
    index = serializers.IntegerField(help_text="First version on the new revision")
    to = serializers.IntegerField()

    def get_fields(self):  # "from" is a Python keyword
        fields = super().get_fields()
        fields["from"] = serializers.IntegerField()
        return fields


class HistoryPolicyChange(serializers.Serializer):
    series = serializers.CharField()
    index = serializers.IntegerField(help_text="First version computed under the new policy")
    to = serializers.CharField(help_text="The box policy from there on")

    def get_fields(self):  # "from" is a Python keyword
        fields = super().get_fields()
        fields["from"] = serializers.CharField()
        return fields


class HistorySource(serializers.Serializer):
    metric = serializers.CharField(help_text="AP, or miss_rate for a pedestrian setup")
    level = serializers.CharField(help_text="Pass as ?level= (or ?setup=)")
    protocol = serializers.CharField(help_text="The level protocol holding it")
    lower_is_better = serializers.BooleanField()
    label = serializers.CharField()


class History(serializers.Serializer):
    protocol = serializers.CharField(help_text="The primary protocol, or the level's")
    metric = serializers.CharField()
    level = serializers.CharField(allow_null=True, help_text="The level or setup read")
    lower_is_better = serializers.BooleanField(help_text="True for miss rate")
    sources = HistorySource(many=True, help_text="The suite's levels and setups")
    class_ = serializers.CharField()
    view = serializers.ChoiceField(choices=["joined", "separate"])
    metrics = serializers.ListField(child=serializers.CharField())
    classes = serializers.ListField(child=serializers.CharField())
    baseline = serializers.IntegerField(allow_null=True, help_text="The baseline version's id")
    versions = HistoryVersion(many=True)
    series = HistorySeries(many=True)
    changes = HistoryChange(many=True)
    policy_changes = HistoryPolicyChange(
        many=True, help_text="Where a line's box policy changes: numbers computed differently"
    )

    def get_fields(self):
        fields = super().get_fields()
        fields["class"] = fields.pop("class_")
        return fields
