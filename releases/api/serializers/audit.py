"""The audit trail's events as the API returns them."""

from rest_framework import serializers

from ...models import AuditEvent


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
