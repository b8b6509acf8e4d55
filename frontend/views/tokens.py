"""API tokens of the signed-in user."""

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied
from django.http import Http404
from django.shortcuts import redirect, render

from evaluation.services import UploadError


@login_required
def api_tokens(request):
    from releases import tokens

    new_token, error = None, None
    if request.method == "POST":
        if request.POST.get("action") == "revoke":
            try:
                tokens.revoke_token(request.user, int(request.POST.get("token", 0)))
            except (ValueError, PermissionDenied):
                raise Http404("no such token") from None
            messages.success(request, "token revoked")
            return redirect("tokens")
        try:
            row, token = tokens.create_token(request.user, request.POST.get("name", ""))
        except UploadError as e:
            error = str(e)
        else:
            new_token = {"row": row, "token": token}
    response = render(
        request,
        "frontend/tokens.html",
        {"tokens": request.user.api_tokens.all(), "new_token": new_token, "error": error},
        status=400 if error else 200,
    )
    response["Cache-Control"] = "no-store"  # it may hold a new token
    return response
