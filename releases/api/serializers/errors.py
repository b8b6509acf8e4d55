"""The body of every refusal, for the schema (``releases/api/errors.py`` declares it on
every operation)."""

from rest_framework import serializers


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
