from django.contrib import admin

from .models import AuditEvent, Detector, Membership, ModelVersion, PredictionSet, Team


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


@admin.register(Detector)
class DetectorAdmin(admin.ModelAdmin):
    list_display = ["name", "team", "primary_protocol"]
    list_select_related = ["team"]


@admin.register(ModelVersion)
class ModelVersionAdmin(admin.ModelAdmin):
    list_display = ["detector", "label", "source_commit", "created_by", "created_at"]
    list_select_related = ["detector", "created_by"]


@admin.register(PredictionSet)
class PredictionSetAdmin(admin.ModelAdmin):
    list_display = ["version", "split", "predictions", "uploaded_by", "uploaded_at"]
    list_select_related = ["version__detector", "split", "predictions", "uploaded_by"]

    def has_change_permission(self, request, obj=None):
        return False


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
