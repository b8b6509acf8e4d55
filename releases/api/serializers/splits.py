"""Benchmark splits and their images: what the API returns and accepts."""

from rest_framework import serializers

from evaluation.models import BenchmarkSplit


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
