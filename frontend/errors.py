"""The site's 400, 403 and 404 pages: the navigation stays, and the page says why."""

from django.http import JsonResponse
from django.shortcuts import render
from django.urls import Resolver404


def _why(exception, default):
    """The exception's message when it is one (services write it for a person)."""
    message = exception.args[0] if exception is not None and exception.args else None
    if isinstance(exception, Resolver404) or not isinstance(message, str) or not message:
        return default
    return message


def not_found(request, exception=None):
    """404: under /api/ the API's error body (``releases.api.errors``), else a page."""
    from releases.api import errors

    if request.path.startswith("/api/"):
        return errors.not_found(request, exception)
    why = _why(exception, "no such page")
    return render(request, "404.html", {"why": why, "request_path": request.path}, status=404)


def permission_denied(request, exception=None):
    """403: the service's refusal names the role that may (e.g. "only engineers and
    leads of Shuttle Perception can")."""
    from releases.api import errors

    why = _why(exception, "your role does not allow this")
    if request.path.startswith("/api/"):
        return JsonResponse(errors.body(403, "permission_denied", [("", why)]), status=403)
    return render(request, "403.html", {"why": why}, status=403)


def bad_request(request, exception=None):
    """400: Django refused to read the request (``SuspiciousOperation`` and its kinds:
    too many fields or files, a malformed body), 413 for a body over the size limit
    (``releases.api.errors.malformed``). Under /api/ the API's error body."""
    from releases.api import errors

    status, code, why = errors.malformed(exception) or (400, "bad_request", "bad request")
    if request.path.startswith("/api/"):
        return JsonResponse(errors.body(status, code, [("", why)]), status=status)
    title = "Request too large" if status == 413 else "Bad request"
    return render(request, "400.html", {"title": title, "why": why}, status=status)
