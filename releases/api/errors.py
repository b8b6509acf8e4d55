"""One error body for every refusal of the API.

``{"status": 400, "code": "invalid", "message": "rules[0].threshold: must be …",
"errors": [{"path": "rules[0].threshold", "message": "must be …"}]}``; for a bad file
also ``"file"``, ``"record"`` and ``"field"`` (the record and field inside the file).
"""

import logging

from django.conf import settings
from django.core.exceptions import (
    ObjectDoesNotExist,
    RequestDataTooBig,
    SuspiciousOperation,
    TooManyFieldsSent,
    TooManyFilesSent,
)
from django.core.exceptions import PermissionDenied as DjangoPermissionDenied
from django.http import Http404
from drf_spectacular.openapi import AutoSchema
from drf_spectacular.utils import OpenApiResponse
from rest_framework import exceptions
from rest_framework.response import Response
from rest_framework.views import exception_handler

from evaluation import engine
from evaluation.services import UploadConflict, UploadError

log = logging.getLogger(__name__)


def _flatten(detail, path=""):
    """DRF's nested error detail as [(path, message)], paths like ``rules[2].kind``."""
    if isinstance(detail, dict):
        out = []
        for key, value in detail.items():
            key = "" if key == "non_field_errors" else str(key)
            out += _flatten(value, f"{path}.{key}" if path and key else path or key)
        return out
    if isinstance(detail, list):
        if all(isinstance(item, (str, exceptions.ErrorDetail)) for item in detail):
            return [(path, str(item)) for item in detail]
        out = []
        for i, item in enumerate(detail):
            out += _flatten(item, f"{path}[{i}]")
        return out
    return [(path, str(detail))]


def body(status_code, code, errors, **extra):
    first_path, first_message = errors[0]
    message = f"{first_path}: {first_message}" if first_path else first_message
    return {
        "status": status_code,
        "code": code,
        "message": message,
        "errors": [{"path": p, "message": m} for p, m in errors],
        **extra,
    }


def malformed(exc):
    """``(status, code, message)`` for a request Django refused to parse, else None.

    Django raises these while reading the body (its limits ``DATA_UPLOAD_MAX_*``); they
    are the client's fault, so 413 for a body over the size limit and 400 for the rest.
    """
    if isinstance(exc, RequestDataTooBig):
        limit = settings.DATA_UPLOAD_MAX_MEMORY_SIZE
        return (
            413,
            "too_large",
            (
                f"the request body is larger than {limit} bytes, the limit for a request "
                "that is not a file upload"
            ),
        )
    if isinstance(exc, TooManyFieldsSent):
        limit = settings.DATA_UPLOAD_MAX_NUMBER_FIELDS
        return 400, "too_many_fields", f"too many fields: at most {limit} per request"
    if isinstance(exc, TooManyFilesSent):
        limit = settings.DATA_UPLOAD_MAX_NUMBER_FILES
        return 400, "too_many_files", f"too many files: at most {limit} per request"
    if isinstance(exc, SuspiciousOperation):  # e.g. a malformed multipart body
        return 400, "bad_request", "the request is malformed and was not read"
    return None


def _refusal(exc):
    """``(path, message)`` of a service's refusal: its message names the path first
    (``"class_thresholds.Van: …"``, as the pages show it), which ``body`` puts back."""
    message = str(exc)
    if exc.path and message.startswith(f"{exc.path}: "):
        message = message[len(exc.path) + 2 :]
    return exc.path, message


def handle(exc, context):
    """DRF's exception handler, reshaped into ``body``; service refusals become 400/409."""
    from ..services import DecisionError

    refused = malformed(exc)
    if refused is not None:
        status, code, message = refused
        log.warning("refused a malformed request to %s: %s", context.get("view"), exc)
        return Response(body(status, code, [("", message)]), status=status)
    if isinstance(exc, engine.InputError):
        located = {k: v for k, v in exc.as_dict().items() if k != "message"}
        errors = [(getattr(exc, "argument", ""), str(exc))]  # which upload, if known
        return Response(body(400, "invalid_file", errors, **located), status=400)
    if isinstance(exc, DecisionError):
        return Response(body(409, "not_allowed", [("", str(exc))]), status=409)
    if isinstance(exc, UploadConflict):
        return Response(body(409, "conflict", [_refusal(exc)]), status=409)
    if isinstance(exc, UploadError):
        return Response(body(400, "refused", [_refusal(exc)]), status=400)
    if isinstance(exc, (Http404, ObjectDoesNotExist)):
        exc = exceptions.NotFound(str(exc) or "not found")
    elif isinstance(exc, DjangoPermissionDenied):
        exc = exceptions.PermissionDenied(str(exc) or "permission denied")
    response = exception_handler(exc, context)
    if response is None:
        log.error("API error in %s", context.get("view"), exc_info=exc)
        errors = [("", "internal error; the server log has the details")]
        return Response(body(500, "server_error", errors), status=500)
    detail = response.data
    if isinstance(detail, dict) and set(detail) == {"detail"}:
        detail = detail["detail"]
    code = exc.get_codes() if isinstance(exc, exceptions.APIException) else "error"
    if not isinstance(code, str):
        code = "invalid"
    response.data = body(response.status_code, code, _flatten(detail) or [("", "error")])
    return response


def not_found(request, exception=None):
    """The project's 404 handler: the API's error body under /api/, else Django's page
    (a path that matches no route, e.g. ``/api/v1/versions/abc/``, never reaches DRF)."""
    from django.http import JsonResponse
    from django.views.defaults import page_not_found

    if request.path.startswith("/api/"):
        return JsonResponse(
            body(404, "not_found", [("", f"no such URL: {request.path}")]), status=404
        )
    return page_not_found(request, exception)


# The schema ------------------------------------------------------------------------

DESCRIPTIONS = {
    400: "Invalid input; each entry of errors names a field",
    401: "No token, or an unknown or revoked one",
    403: "The user's role does not allow this",
    404: "No such object, or one of another team",
    409: "Not allowed in the object's present state",
    413: "The upload is over the limit",
    429: "Too many requests with this token",
}


def error_response(status_code):
    """A documented error response, for statuses an operation's shape does not imply."""
    from .serializers import ErrorSerializer

    return OpenApiResponse(ErrorSerializer, description=DESCRIPTIONS[status_code])


class ApiSchema(AutoSchema):
    """drf-spectacular's schema, plus the error responses (``body``) an operation can give:
    401 and 429 always, 400 with input, 403 for writes, 404 with a path id, a page or a
    format. Others (404 for ids in the body, 409, 413) are declared on the view."""

    def get_operation(self, path, path_regex, path_prefix, method, registry):
        from .serializers import ErrorSerializer

        operation = super().get_operation(path, path_regex, path_prefix, method, registry)
        if operation is None:
            return None
        parameters = operation.get("parameters", [])
        query = {p["name"] for p in parameters if p["in"] == "query"}
        statuses = [401, 429]
        if "requestBody" in operation or query - {"page", "page_size", "format"}:
            statuses.append(400)
        if self.method != "GET":
            statuses.append(403)
        if any(p["in"] == "path" for p in parameters) or query & {"page", "format"}:
            statuses.append(404)
        error = self.resolve_serializer(ErrorSerializer, "response").ref
        for status_code in statuses:
            operation["responses"].setdefault(
                str(status_code),
                {
                    "description": DESCRIPTIONS[status_code],
                    "content": {"application/json": {"schema": error}},
                },
            )
        operation["responses"] = dict(sorted(operation["responses"].items()))
        return operation
