"""Refuse request bodies over the upload limit before anything reads them."""

from django.shortcuts import render

from evaluation.storage import oversized


class UploadLimitMiddleware:
    """Answers an oversized request with 413 at once: pages with a page that keeps the
    site's navigation, the API with its error body. It runs before any view and before
    the CSRF check (which would parse the form), so the body is never read: no
    temporary file, no worker held while hundreds of megabytes arrive."""

    def __init__(self, get_response):
        self.get_response = get_response

    def __call__(self, request):
        reason = oversized(request)
        if reason is None:
            return self.get_response(request)
        if request.path.startswith("/api/"):
            from django.http import JsonResponse

            from releases.api.errors import body

            response = JsonResponse(body(413, "too_large", [("", reason)]), status=413)
        else:
            response = render(request, "frontend/too_large.html", {"reason": reason}, status=413)
        response["Connection"] = "close"  # the unread body must not be taken for a request
        return response
