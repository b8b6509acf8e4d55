"""Admin: everything visible; frozen splits and finished evaluations read-only."""

from django.contrib import admin

from .models import (
    BenchmarkSplit,
    ClassScore,
    Evaluation,
    PredictionFile,
    PredictionPieces,
    Scorecard,
    SliceScore,
    StoredProtocol,
)


class ReadOnlyAdmin(admin.ModelAdmin):
    """Rows that are history: shown, never edited or deleted here."""

    def has_add_permission(self, request):
        return False

    def has_change_permission(self, request, obj=None):
        return False

    def has_delete_permission(self, request, obj=None):
        return False


@admin.register(BenchmarkSplit)
class BenchmarkSplitAdmin(ReadOnlyAdmin):
    list_display = [
        "name",
        "revision",
        "image_count",
        "box_count",
        "annotation_policy",
        "vis_ratio_reading",
        "hash_scheme",
        "annotations_left_out",
        "sha256",
        "frozen_at",
    ]
    search_fields = ["name", "sha256"]


@admin.register(PredictionFile)
class PredictionFileAdmin(ReadOnlyAdmin):
    list_display = ["original_name", "sha256", "size", "record_count", "uploaded_at"]
    search_fields = ["original_name", "sha256"]


@admin.register(PredictionPieces)
class PredictionPiecesAdmin(ReadOnlyAdmin):
    """Pieces are written by the upload check only; an edit would break their hashes."""

    list_display = [
        "predictions",
        "split",
        "box_policy",
        "unknown_images",
        "unknown_classes",
        "images_per_shard",
    ]


@admin.register(Evaluation)
class EvaluationAdmin(admin.ModelAdmin):
    list_display = ["id", "split", "protocol", "state", "progress", "attempts", "finished_at"]
    list_filter = ["state", "protocol"]
    list_select_related = ["split", "predictions"]
    # What is evaluated is fixed when it is requested (an upload never drops images).
    readonly_fields = [
        "split",
        "predictions",
        "protocol",
        "box_policy",
        "scope",
        "file_name",
        "unknown_images",
        "unknown_classes",
    ]

    def has_add_permission(self, request):
        return False

    def has_change_permission(self, request, obj=None):
        return obj is None or not obj.finished

    def has_delete_permission(self, request, obj=None):
        return False


class ClassScoreInline(admin.TabularInline):
    model = ClassScore
    extra = 0
    can_delete = False

    def has_change_permission(self, request, obj=None):
        return False

    def has_add_permission(self, request, obj=None):
        return False


@admin.register(Scorecard)
class ScorecardAdmin(ReadOnlyAdmin):
    list_display = ["evaluation", "protocol", "engine_version", "split_sha256", "created_at"]
    inlines = [ClassScoreInline]


@admin.register(SliceScore)
class SliceScoreAdmin(ReadOnlyAdmin):
    list_display = ["scorecard", "kind", "name", "class_name", "ap"]
    list_filter = ["kind"]


@admin.register(StoredProtocol)
class StoredProtocolAdmin(ReadOnlyAdmin):
    """Custom protocols are defined in a benchmark suite; a name keeps its definition."""

    list_display = ["name", "sha256", "created_by", "created_at"]
