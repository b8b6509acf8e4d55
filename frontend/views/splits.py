"""Benchmark splits: the list, one split's page, and loading a new frozen split."""

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied
from django.http import Http404
from django.shortcuts import redirect, render
from django.urls import reverse

from evaluation import engine, left_out, levels
from evaluation import images as split_images
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError
from releases import selectors
from releases.split_images import attach_split_images

from ..forms import SplitForm


@login_required
def split_list(request):
    splits = BenchmarkSplit.objects.all()
    return render(
        request,
        "frontend/splits.html",
        {"splits": splits, "can_load": selectors.can_load_splits(request.user)},
    )


@login_required
def split(request, split_id):
    try:
        found = BenchmarkSplit.objects.get(pk=split_id)
    except BenchmarkSplit.DoesNotExist:
        raise Http404("no such split") from None
    return render(
        request,
        "frontend/split.html",
        {
            "split": found,
            "images": split_images.images_of(found),
            "can_attach": selectors.can_attach_split_images(request.user),
            "usage": selectors.split_usage(request.user, found),
            # One reverse, not one per listed version (the list grows with versions).
            "version_prefix": reverse("version", args=[0])[:-2],
            "class_counts": [(c, found.class_counts.get(c)) for c in found.classes],
            "tags": sorted(found.tags.items()),
            "road": levels.split_page(found.road_counts),
            "left_out": left_out.of_split(found),
        },
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
                annotations=data["annotations"] or None,
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
def split_images_upload(request, split_id):
    """POST a zip archive, a folder of image files or a URL template for a split."""
    if request.method != "POST":
        return redirect("split", split_id)
    try:
        found = BenchmarkSplit.objects.get(pk=split_id)
    except BenchmarkSplit.DoesNotExist:
        raise Http404("no such split") from None
    try:
        attach_split_images(
            request.user,
            found,
            archive=request.FILES.get("archive"),
            files=request.FILES.getlist("files"),
            url_template=request.POST.get("url_template", "").strip(),
        )
    except UploadError as e:
        messages.error(request, str(e))
    else:
        messages.success(request, f"{found} has its images")
    return redirect("split", split_id)
