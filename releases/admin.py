from django import forms
from django.contrib import admin

from . import detectors
from .models import (
    AuditEvent,
    AuditVerification,
    BenchmarkSuite,
    Detector,
    Judgement,
    Membership,
    ModelVersion,
    Notification,
    Outcome,
    PredictionSet,
    SignOff,
    Team,
)


class ReadOnly(admin.ModelAdmin):
    """Decisions, judgements and suites are written only by their services (sign-off,
    judging, set_suite), never in the admin: no add, change or delete."""

    def has_add_permission(self, request, obj=None):
        return False

    def has_change_permission(self, request, obj=None):
        return False

    def has_delete_permission(self, request, obj=None):
        return False


@admin.register(SignOff)
class SignOffAdmin(ReadOnly):
    list_display = ["version", "decision", "override", "verdict", "decided_by", "decided_at"]
    list_select_related = ["version__detector", "decided_by"]


@admin.register(Judgement)
class JudgementAdmin(ReadOnly):
    list_display = ["version", "verdict", "criteria", "suite", "baseline", "judged_at"]
    list_select_related = ["version__detector", "criteria__detector", "suite__detector", "baseline"]


@admin.register(Outcome)
class OutcomeAdmin(ReadOnly):
    list_display = ["version", "judgement", "rule_index", "split", "class_name", "status"]
    list_select_related = ["version__detector", "judgement", "split"]


@admin.register(BenchmarkSuite)
class BenchmarkSuiteAdmin(ReadOnly):
    list_display = [
        "detector",
        "number",
        "protocols",
        "box_policy",
        "unknown_classes",
        "created_at",
    ]
    list_select_related = ["detector"]


class MembershipInline(admin.TabularInline):
    model = Membership
    extra = 0


@admin.register(Membership)
class MembershipAdmin(admin.ModelAdmin):
    list_display = ["user", "team", "role"]
    list_filter = ["role", "team"]
    list_select_related = ["user", "team"]


@admin.register(Team)
class TeamAdmin(admin.ModelAdmin):
    list_display = ["name", "slug"]
    inlines = [MembershipInline]


class DetectorForm(forms.ModelForm):
    class Meta:
        model = Detector
        fields = "__all__"

    def clean_classes(self):
        try:
            classes = detectors.validate_classes(self.cleaned_data["classes"])
            detectors.check_removal(self.instance, classes)
        except detectors.DetectorError as e:
            raise forms.ValidationError(str(e)) from None
        return classes


@admin.register(Detector)
class DetectorAdmin(admin.ModelAdmin):
    """Detectors are created with their suite on the page or the API, never here; a
    change of classes goes through ``detectors.set_classes`` (a new suite version,
    audited, candidates judged again), the other fields are saved as they are."""

    form = DetectorForm
    list_display = ["name", "team", "primary_protocol"]
    list_select_related = ["team"]
    # The protocols mirror the benchmark suite; change them through the suite.
    readonly_fields = ["protocols", "primary_protocol"]

    def has_add_permission(self, request):
        return False

    def save_model(self, request, obj, form, change):
        classes = obj.classes
        if "classes" in form.changed_data:
            obj.classes = Detector.objects.get(pk=obj.pk).classes
        super().save_model(request, obj, form, change)
        if "classes" in form.changed_data:
            detectors.set_classes(request.user, obj, classes)


@admin.register(ModelVersion)
class ModelVersionAdmin(admin.ModelAdmin):
    """Versions are created by the pipeline, the page or the API
    (``services.create_version``); here they are read. A version's detector and label
    are what its judgements, sign-offs and audit trail name: moving or relabelling it
    would rewrite that history unaudited, so nothing is editable or deletable."""

    list_display = ["detector", "label", "source_commit", "created_by", "created_at"]
    list_select_related = ["detector", "created_by"]

    def has_add_permission(self, request):
        return False

    def has_change_permission(self, request, obj=None):
        return False

    def has_delete_permission(self, request, obj=None):
        return False  # its prediction sets, judgements and sign-offs are evidence


@admin.register(PredictionSet)
class PredictionSetAdmin(admin.ModelAdmin):
    """Created only by an upload (``services._record_set``) or a re-score
    (``rescore.rescore``), never here. Never deleted either: a set is evidence a verdict
    was judged on (deleting a regressing one and judging again would read "pass"); a
    failed upload is replaced (kept as history), not removed."""

    list_display = [
        "version",
        "split",
        "predictions",
        "uploaded_by",
        "uploaded_at",
        "rescored_from",
        "rescored_by",
        "rescored_at",
    ]
    list_select_related = ["version__detector", "split", "predictions", "uploaded_by"]

    def has_add_permission(self, request):
        return False

    def has_change_permission(self, request, obj=None):
        return False

    def has_delete_permission(self, request, obj=None):
        return False

    def get_actions(self, request):
        actions = super().get_actions(request)
        actions.pop("delete_selected", None)
        return actions


@admin.register(AuditEvent)
class AuditEventAdmin(admin.ModelAdmin):
    list_display = ["id", "kind", "subject", "actor", "created_at", "hash"]
    list_filter = ["kind"]

    def has_add_permission(self, request):
        return False

    def has_change_permission(self, request, obj=None):
        return False

    def has_delete_permission(self, request, obj=None):
        return False


@admin.register(Notification)
class NotificationAdmin(ReadOnly):
    """Delivered by the notification task and its sweep, never edited here."""

    list_display = ["judgement", "version", "state", "attempts", "emailed", "due_at", "last_error"]
    list_filter = ["state"]
    list_select_related = ["version__detector", "judgement"]


@admin.register(AuditVerification)
class AuditVerificationAdmin(ReadOnly):
    list_display = ["checked_at", "checked_by", "ok", "events", "results", "head_file"]
