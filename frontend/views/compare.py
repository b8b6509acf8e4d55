"""Comparing two versions of a detector, and queueing the ΔAP intervals of a pair."""

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.http import Http404
from django.shortcuts import redirect, render
from django.urls import reverse
from django.utils.html import json_script

from evaluation.services import UploadError
from releases import selectors
from releases.selectors import errors

from .lookup import detector_or_404
from .miss_rate import embed

#: Above this many classes the two matrices start folded (they stay complete).
OPEN_CONFUSION_CLASSES = 12


def _confusions(user, candidate, reference, splits):
    """Per split: both versions' confusion matrices as grids whose cells link to the
    confusion page's cell members of that version; a failure is shown in place."""
    from urllib.parse import urlencode

    from django.core.exceptions import ObjectDoesNotExist

    from evaluation.storage import ContentMismatch
    from releases.selectors.cause import NotScored

    out = {}
    for entry in splits:
        split = entry["split"]
        try:
            found = errors.confusion_pair(user, candidate, reference, split)
        except (NotScored, ContentMismatch, OSError, ValueError, ObjectDoesNotExist) as e:
            out[split.pk] = {"error": str(e)}
            continue
        labels = found["labels"]
        for side in found["sides"]:
            if side is None:
                continue
            base = reverse("confusion", args=[side["version"].pk])
            query = urlencode({"split": split.pk})
            side["grid"] = [
                {
                    "label": labels[i],
                    "cells": [
                        {
                            "count": count,
                            "column": labels[j],
                            "share": (side["row_normalised"][i] or [None] * len(labels))[j],
                            "diagonal": i == j and i < len(labels) - 1,
                            "link": f"{base}?{query}&row={i}&col={j}#cell",
                        }
                        for j, count in enumerate(counts)
                    ],
                }
                for i, counts in enumerate(side["counts"])
            ]
        found["open"] = len(labels) - 1 <= OPEN_CONFUSION_CLASSES
        out[split.pk] = found
    return out


@login_required
def compare(request, detector_id):
    found = detector_or_404(request.user, detector_id)
    versions = list(found.versions.order_by("-created_at"))
    if len(versions) < 2:
        return render(request, "frontend/compare.html", {"detector": found, "versions": versions})
    by_id = {str(v.pk): v for v in versions}
    candidate = by_id.get(request.GET.get("candidate"), versions[0])
    baseline = selectors.baseline_of(found)
    fallback = versions[1] if candidate == versions[0] else versions[0]
    if baseline is not None and baseline != candidate:
        fallback = baseline
    reference = by_id.get(request.GET.get("reference"), fallback)
    splits = selectors.compare_versions(reference, candidate)
    series = [f"{reference.label} (reference)", f"{candidate.label} (candidate)"]
    for entry in splits:
        embed(entry)
        data = {
            "series": series,
            "classes": {
                name: dict(zip(series, (pair["reference"], pair["candidate"])))
                for name, pair in entry["curves"].items()
            },
        }
        entry["curves_script"] = json_script(data, f"curves-data-{entry['split'].pk}")
    return render(
        request,
        "frontend/compare.html",
        {
            "detector": found,
            "versions": versions,
            "reference": reference,
            "candidate": candidate,
            "splits": splits,
            "errors": {e["split"].pk: e for e in errors.version_breakdowns(candidate, reference)},
            "confusions": _confusions(request.user, candidate, reference, splits),
            "caution": selectors.CAUTION,
        },
    )


@login_required
def compare_intervals(request, detector_id):
    """Queue the ΔAP intervals of the chosen pair (reload the page to see them)."""
    from releases import comparisons

    found = detector_or_404(request.user, detector_id)
    if request.method != "POST":
        return redirect("compare", detector_id=found.pk)
    versions = {str(v.pk): v for v in found.versions.all()}
    reference = versions.get(request.POST.get("reference"))
    candidate = versions.get(request.POST.get("candidate"))
    if reference is None or candidate is None:
        raise Http404("no such version of this detector")
    try:
        queued = comparisons.request_intervals(reference, candidate, request.user)
    except UploadError as e:
        messages.error(request, str(e))
    else:
        messages.success(
            request,
            f"intervals of {candidate.label} − {reference.label} queued on {len(queued)} "
            "split(s); reload in a minute"
            if queued
            else "nothing to compute: every shared split has its intervals or is being computed",
        )
    url = reverse("compare", args=[found.pk])
    return redirect(f"{url}?reference={reference.pk}&candidate={candidate.pk}")
