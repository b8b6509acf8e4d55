"""Uploading predictions, and the live status of an evaluation."""

from django.conf import settings
from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.http import Http404, JsonResponse
from django.shortcuts import redirect, render

from evaluation import engine
from evaluation.models import Evaluation
from evaluation.services import UploadConflict, UploadError
from releases import selectors, services

from ..forms import PredictionsForm
from .lookup import detector_or_404


@login_required
def upload_predictions(request, detector_id):
    found = detector_or_404(request.user, detector_id)
    services.require_upload_right(request.user, found)
    form = PredictionsForm(request.POST or None, request.FILES or None)
    error = None
    if request.method == "POST" and form.is_valid():
        data = form.cleaned_data
        try:
            prediction_set = services.submit_for_label(
                found,
                data["version"],
                data["split"],
                data["predictions"],
                request.user,
                source_commit=data["source_commit"],
                notes=data["notes"],
            )
        except (engine.InputError, UploadError) as e:
            error = str(e)
            status = 409 if isinstance(e, UploadConflict) else 400
        else:
            messages.success(request, f"{prediction_set} stored; scoring is queued")
            return redirect("version", version_id=prediction_set.version_id)
    if not error:
        status = 400 if form.errors else 200
    return render(
        request,
        "frontend/upload.html",
        {
            "detector": found,
            "form": form,
            "error": error,
            "inline_limit": settings.BENCHBOOK_INLINE_VALIDATION_BYTES,
        },
        status=status,
    )


@login_required
def evaluation_status(request, evaluation_id):
    try:
        evaluation = selectors.evaluation_for(request.user, evaluation_id)
    except Evaluation.DoesNotExist:
        raise Http404("no such evaluation") from None
    return JsonResponse(
        {
            "id": evaluation.pk,
            "state": evaluation.state,
            "progress": evaluation.progress,
            "error": evaluation.error if evaluation.state == Evaluation.State.FAILED else "",
            "error_detail": evaluation.error_detail,
        }
    )
