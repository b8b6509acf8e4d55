"""One error body for every refusal of the API.

``{"status": 400, "code": "invalid", "message": "rules[0].threshold: must be …",
"errors": [{"path": "rules[0].threshold", "message": "must be …"}]}``; for a bad file
also ``"file"``, ``"record"`` and ``"field"`` (the record and field inside the file).
"""

import logging

from django.core.exceptions import ObjectDoesNotExist
from django.core.exceptions import PermissionDenied as DjangoPermissionDenied
from django.http import Http404
from rest_framework import exceptions
from rest_framework.response import Response
from rest_framework.views import exception_handler

from evaluation import engine
from evaluation.services import UploadError

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


def handle(exc, context):
    """DRF's exception handler, reshaped into ``body``; service refusals become 400/409."""
    from ..services import DecisionError

    if isinstance(exc, engine.InputError):
        located = {k: v for k, v in exc.as_dict().items() if k != "message"}
        errors = [(getattr(exc, "request_field", ""), str(exc))]
        return Response(body(400, "invalid_file", errors, **located), status=400)
    if isinstance(exc, DecisionError):
        return Response(body(409, "not_allowed", [("", str(exc))]), status=409)
    if isinstance(exc, UploadError):
        return Response(body(400, "refused", [(exc.path, str(exc))]), status=400)
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
