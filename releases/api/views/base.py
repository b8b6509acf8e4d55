"""What every endpoint shares: the Endpoint base (its error schema), query
parameter parsing, lookups of visible objects."""

import datetime

from django.utils.dateparse import parse_datetime
from drf_spectacular.types import OpenApiTypes
from drf_spectacular.utils import OpenApiParameter
from rest_framework import exceptions

from evaluation.storage import oversized

from ... import selectors
from ..errors import ApiSchema


class PayloadTooLarge(exceptions.APIException):
    status_code = 413
    default_code = "too_large"


class NotScored(exceptions.APIException):
    status_code = 409
    default_code = "not_scored"


def _refuse_oversized(request):
    """Refuse before parsing (``frontend.middleware`` answers these first; this keeps
    the view safe without it)."""
    if reason := oversized(request):
        raise PayloadTooLarge(reason)


# Query parameters ------------------------------------------------------------------


def _param(name, kind, description):
    return OpenApiParameter(name, kind, OpenApiParameter.QUERY, description=description)


DETECTOR = _param("detector", int, "Only this detector's")
VERSION = _param("version", int, "Only this version's")
SPLIT = _param("split", int, "Only on this benchmark split")
SINCE = _param("since", OpenApiTypes.DATETIME, "At or after this time (ISO 8601)")
UNTIL = _param("until", OpenApiTypes.DATETIME, "Before this time (ISO 8601)")


class Endpoint:
    """Base of every view: its schema documents the error responses (errors.ApiSchema)."""

    schema = ApiSchema()


# Ids are 64-bit signed integers in both databases; SQLite cannot even compare a larger one.
ID_RANGE = range(-(2**63), 2**63)


def _int(request, name):
    raw = request.query_params.get(name)
    if raw in (None, ""):
        return None
    try:
        value = int(raw)
    except ValueError:
        raise exceptions.ValidationError({name: [f"must be an integer, got {raw!r}"]}) from None
    if value not in ID_RANGE:
        raise exceptions.ValidationError({name: [f"must be a 64-bit integer, got {raw}"]})
    return value


def _time(request, name):
    """An ISO 8601 date-time, in UTC (a time without an offset is UTC)."""
    raw = request.query_params.get(name)
    if raw in (None, ""):
        return None
    try:
        value = parse_datetime(raw.replace(" ", "+"))
        if value is not None:
            value = value.replace(tzinfo=value.tzinfo or datetime.UTC).astimezone(datetime.UTC)
    except (ValueError, OverflowError):  # well formed but not a date, or beyond year 9999
        value = None
    if value is None:
        raise exceptions.ValidationError({name: [f"must be an ISO 8601 date-time, got {raw!r}"]})
    return value


def _text(request, name):
    """A free-text parameter; PostgreSQL refuses NUL in text, so it is refused here."""
    raw = request.query_params.get(name)
    if raw and "\x00" in raw:
        raise exceptions.ValidationError({name: ["must not contain NUL characters"]})
    return raw


def _choice(request, name, allowed):
    raw = request.query_params.get(name)
    if raw in (None, ""):
        return None
    if raw not in allowed:
        raise exceptions.ValidationError({name: [f"must be one of {', '.join(allowed)}"]})
    return raw


def _filter(queryset, request, **fields):
    """Apply the common filters; ``fields`` maps a parameter to a lookup."""
    for name, lookup in fields.items():
        if name in ("since", "until"):
            value = _time(request, name)
        else:
            value = _int(request, name)
        if value is not None:
            queryset = queryset.filter(**{lookup: value})
    return queryset


def _detector(request, pk):
    return selectors.detector_for(request.user, pk)


def _version(request, pk):
    return selectors.version_for(request.user, pk)


def _valid(serializer_class, request):
    serializer = serializer_class(data=request.data)
    serializer.is_valid(raise_exception=True)
    return serializer.validated_data
