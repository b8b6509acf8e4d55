"""Re-scoring a detector's stored predictions on a new split revision (leads), and the
download of an evaluation's stored predictions file."""

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied
from django.http import Http404, HttpResponse
from django.shortcuts import redirect, render

from evaluation.models import BenchmarkSplit, Evaluation
from evaluation.services import UploadError
from evaluation.storage import ContentMismatch
from releases import downloads, rescore, selectors

from .lookup import detector_or_404


@login_required
def rescore_page(request, detector_id):
    found = detector_or_404(request.user, detector_id)
    error = None
    if request.method == "POST":
        if not selectors.can_rescore(request.user, found):
            raise PermissionDenied(f"only leads of {found.team} can re-score {found}")
        try:
            split = BenchmarkSplit.objects.filter(pk=_int(request.POST.get("split"))).first()
            if split is None:
                raise UploadError("split: choose a split revision")
            chosen = request.POST.getlist("versions")
            versions = [_int(v) for v in chosen] if chosen else None
            if versions is not None and None in versions:
                raise UploadError("versions: not a version id")
            result = rescore.rescore(found, request.user, split, versions)
        except UploadError as e:
            error = str(e)
        else:
            done = ", ".join(o.version.label for o in result.rescored) or "none"
            messages.success(request, f"Re-scored on {split}: {done}.")
            for o in result.skipped:
                messages.info(request, f"{o.version.label} skipped: {o.reason}.")
            return redirect("rescore", detector_id=found.pk)
    choices = selectors.rescore_choices(found)
    return render(
        request,
        "frontend/rescore.html",
        {
            "detector": found,
            "choices": choices,
            "behind": any(c["behind"] for c in choices),
            "rescored": selectors.rescored_sets(found),
            "can_rescore": selectors.can_rescore(request.user, found),
            "error": error,
        },
        status=400 if error else 200,
    )


def _int(value):
    try:
        number = int(value)
    except (TypeError, ValueError):
        return None
    return number if 0 < number < 2**63 else None


@login_required
def predictions_download(request, evaluation_id):
    """The stored predictions file of an evaluation the user may see (its exact bytes,
    hash-checked first; ``releases.downloads``)."""
    try:
        return downloads.predictions_response(request.user, evaluation_id)
    except Evaluation.DoesNotExist:
        raise Http404("no such evaluation") from None
    except ContentMismatch as e:
        return HttpResponse(str(e), status=409, content_type="text/plain; charset=utf-8")
