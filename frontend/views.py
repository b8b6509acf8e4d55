"""Pages. Views parse input, call one service or selector, and render."""

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied
from django.http import Http404, JsonResponse
from django.shortcuts import redirect, render

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit, Evaluation
from evaluation.services import UploadError
from releases import selectors, services
from releases.models import Detector

from .forms import PredictionsForm, SplitForm


def _detector_or_404(user, detector_id):
    try:
        return selectors.detector_for(user, detector_id)
    except Detector.DoesNotExist:
        raise Http404("no such detector") from None


@login_required
def overview(request):
    detectors = selectors.visible_detectors(request.user).prefetch_related("versions")
    return render(request, "frontend/overview.html", {"detectors": detectors})


@login_required
def split_list(request):
    splits = BenchmarkSplit.objects.all()
    return render(
        request,
        "frontend/splits.html",
        {"splits": splits, "can_load": selectors.can_load_splits(request.user)},
    )


@login_required
def load_split(request):
    if not selectors.can_load_splits(request.user):
        raise PermissionDenied("only engineers and leads load benchmark splits")
    form = SplitForm(request.POST or None, request.FILES or None)
    error = None
    if request.method == "POST" and form.is_valid():
        data = form.cleaned_data
        try:
            split = evaluation_services.load_split(
                name=data["name"],
                revision=data["revision"],
                truth=data["truth"],
                images=data["images"],
                description=data["description"],
                created_by=request.user.get_username(),
            )
        except (engine.InputError, UploadError) as e:
            error = str(e)
        else:
            messages.success(request, f"{split} is frozen (sha256 {split.sha256[:16]}…)")
            return redirect("splits")
    status = 400 if error or form.errors else 200
    return render(
        request, "frontend/load_split.html", {"form": form, "error": error}, status=status
    )


@login_required
def detector(request, detector_id):
    found = _detector_or_404(request.user, detector_id)
    return render(
        request,
        "frontend/detector.html",
        {
            "detector": found,
            "history": selectors.history_for(found),
            "can_upload": selectors.role_in(request.user, found.team) in selectors.UPLOAD_ROLES,
        },
    )


@login_required
def upload_predictions(request, detector_id):
    found = _detector_or_404(request.user, detector_id)
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
        except UploadError as e:
            error = str(e)
        else:
            messages.success(request, f"{prediction_set} stored; scoring is queued")
            return redirect("detector", detector_id=found.pk)
    status = 400 if error or form.errors else 200
    return render(
        request,
        "frontend/upload.html",
        {"detector": found, "form": form, "error": error},
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
