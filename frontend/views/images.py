"""Cause pages: the per-image comparison of two versions, one image's drill-down and its
image file. Read-only; every object goes through the visibility selectors, so another
team's is a 404."""

from urllib.parse import urlencode

from django.contrib.auth.decorators import login_required
from django.http import FileResponse, Http404
from django.shortcuts import render
from django.urls import reverse
from django.utils.html import json_script

from evaluation.models import BenchmarkSplit
from releases.models import ModelVersion
from releases.selectors import cause
from releases.selectors import image_list as listing_of

from .lookup import version_or_404

MISSING = (ModelVersion.DoesNotExist, BenchmarkSplit.DoesNotExist, cause.NotScored)


def _int(value):
    return int(value) if value and str(value).isdigit() else None


def _pair_or_404(request, version_id, split_id):
    try:
        return cause.pair_for(
            request.user, version_id, split_id, against=_int(request.GET.get("against"))
        )
    except MISSING as e:
        raise Http404(str(e) or "not found") from None


@login_required
def image_detail(request, version_id, split_id, image):
    pair = _pair_or_404(request, version_id, split_id)
    try:
        drill = cause.image_drilldown(pair, image)
    except IndexError:
        raise Http404("no such image in this split") from None
    sides = [{"key": "candidate", "label": pair.candidate.version.label}]
    if pair.reference is not None:
        sides.append({"key": "reference", "label": pair.reference.version.label})
    image_src = drill["image"]["url"]
    if drill["image"]["source"] == "files" and drill["image"]["file_name"]:
        image_src = reverse("image-file", args=[version_id, split_id, image])
    listing = listing_of.listing_filters(request.GET)
    deployed = listing_of.slider_start(pair, listing.class_name)
    neighbours = listing_of.neighbours(pair, listing, image)
    query = urlencode({"split": split_id, **listing.query(), **_against(pair)})

    def link(index):
        if index is None:
            return None
        return reverse("image-detail", args=[version_id, split_id, index]) + "?" + query

    return render(
        request,
        "frontend/image.html",
        {
            "version": pair.candidate.version,
            "detector": pair.candidate.version.detector,
            "reference": pair.reference.version if pair.reference else None,
            "has_reference": pair.reference is not None,
            "split": pair.split,
            "drill": drill,
            "drill_script": json_script(drill, "drilldown-data"),
            "sides": sides,
            "image_src": image_src,
            "threshold": f"{deployed:.2f}",
            "deployed": listing_of.threshold_words(pair),
            "only_class": listing.class_name,
            "protocol": pair.protocol,
            "query": query,
            "filters": listing.words(),
            "previous": link(neighbours["previous"]),
            "next": link(neighbours["next"]),
            "position": neighbours["position"],
            "total": neighbours["total"],
            "evaluations": [s for s in (pair.candidate, pair.reference) if s is not None],
        },
    )


def _against(pair):
    return {"against": pair.reference.version.pk} if pair.reference is not None else {}


@login_required
def image_file(request, version_id, split_id, image):
    """One stored image file of the split, to a reader of the version (never a public
    media URL)."""
    try:
        opened = cause.image_file_for(request.user, version_id, split_id, image)
    except MISSING + (IndexError,):
        opened = None
    if opened is None:
        raise Http404("no image file")
    handle, mime = opened
    response = FileResponse(handle, content_type=mime)
    response["X-Content-Type-Options"] = "nosniff"
    response["Cache-Control"] = "private, max-age=3600"
    response["Content-Security-Policy"] = "default-src 'none'; sandbox"
    return response


def _version_and_pair(request, version_id):
    """The readable version, ``?split=`` (default its first scored split) and its pair."""
    version = version_or_404(request.user, version_id)
    split_ids = cause.scored_split_ids(version)
    split_id = _int(request.GET.get("split")) or (split_ids[0] if split_ids else None)
    if split_id is None:
        raise Http404("this version has no scored split")
    return version, split_id, _pair_or_404(request, version_id, split_id)


@login_required
def image_list(request, version_id):
    """The per-image comparison of the version with a reference on one split
    (``?split=``, default its first), filtered by class, tag and size, ΔAP of the
    chosen metric; above it the listed images' AP of both versions and the class's
    kinds of error (TIDE) on the split."""
    from releases.selectors import errors

    version, split_id, pair = _version_and_pair(request, version_id)
    listing = listing_of.listing_filters(request.GET)
    error, table = None, {"rows": [], "total": 0, "reasons": ()}
    try:
        table = listing_of.image_table(pair, listing)
    except ValueError as e:
        error = str(e)
    query = urlencode({"split": split_id, **listing.query(), **_against(pair)})
    detail = reverse("image-detail", args=[version_id, split_id, 0])[: -len("0/")]
    return render(
        request,
        "frontend/images.html",
        {
            "version": version,
            "detector": version.detector,
            "pair": pair,
            "reference": pair.reference.version if pair.reference else None,
            "split": pair.split,
            "splits": cause.scored_splits(version),
            "listing": listing,
            "classes": pair.classes,
            "tags": pair.truth.tags(),
            "sizes": [a for a in pair.candidate.records.area_names if a != "all"],
            "metrics": list(listing_of.METRIC_IOU),
            "versions": cause.other_versions(version),
            "table": table,
            "error": error,
            "query": query,
            "detail_prefix": detail,
            "thresholds": listing_of.threshold_words(pair),
            "kinds": None if error else errors.pair_breakdown(pair, listing.class_name),
            "evaluations": [s for s in (pair.candidate, pair.reference) if s is not None],
        },
    )


@login_required
def confusion(request, version_id):
    """The confusion matrix of the version on one split at the deployed threshold(s);
    ``?row=&col=`` lists one cell's detections and missed boxes."""
    from releases.selectors import errors

    version, split_id, pair = _version_and_pair(request, version_id)
    row, column = _int(request.GET.get("row")), _int(request.GET.get("col"))
    found = errors.confusion_for(pair, row, column)
    labels = found["matrix"]["labels"]
    normalised = request.GET.get("view") == "normalised"
    grid = [
        {
            "label": labels[i],
            "cells": [
                {
                    "column": j,
                    "count": count,
                    "share": (found["matrix"]["row_normalised"][i] or [None] * len(labels))[j],
                    "diagonal": i == j and i < len(labels) - 1,
                    "chosen": i == row and j == column,
                }
                for j, count in enumerate(counts)
            ],
            "index": i,
        }
        for i, counts in enumerate(found["matrix"]["counts"])
    ]
    query = urlencode({"split": split_id, **_against(pair)})
    return render(
        request,
        "frontend/confusion.html",
        {
            "version": version,
            "detector": version.detector,
            "split": pair.split,
            "splits": cause.scored_splits(version),
            "labels": labels,
            "grid": grid,
            "normalised": normalised,
            "cell": found["cell"],
            "query": query,
            "thresholds": listing_of.threshold_words(pair),
            "protocol": pair.protocol,
            "detail_prefix": reverse("image-detail", args=[version_id, split_id, 0])[: -len("0/")],
        },
    )
