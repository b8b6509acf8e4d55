"""A detector's history page and the page where a lead creates a detector."""

import json

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied
from django.core.paginator import Paginator
from django.shortcuts import redirect, render
from django.urls import reverse

from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError
from releases import selectors

from .lookup import detector_or_404

TABLE_ROWS = 25  # badges are computed for these rows (verdicts_of: every set and evaluation)


@login_required
def detector(request, detector_id):
    """The chart and table carry one metric and class (default mean AP, one line per
    split name); the chart fetches another selection from the history API."""
    found = detector_or_404(request.user, detector_id)
    # the metric selector's level choices are "metric@level" (one select, no script)
    metric, _, level = (request.GET.get("metric") or "AP").partition("@")
    chosen = {
        "metric": metric,
        "level": level or request.GET.get("level"),
        "setup": request.GET.get("setup"),
        "class_name": request.GET.get("class") or selectors.history.MEAN,
        "revisions": request.GET.get("revisions") or "joined",
    }
    error = None
    try:
        chart = selectors.history_chart(found, **chosen)
    except selectors.HistoryError as e:
        error = str(e)
        chart = selectors.history_chart(found)
    # The table: newest first, one page of versions, each with its badge (decision or
    # current verdict, computed for these rows only).
    rows = Paginator(list(reversed(range(len(chart["versions"])))), TABLE_ROWS).get_page(
        request.GET.get("page")
    )
    shown = [chart["versions"][i] for i in rows]
    objects = found.versions.select_related("sign_off").filter(pk__in=[v["id"] for v in shown])
    badges = selectors.version_badges(objects)
    several = {line["name"] for line in chart["series"] if len(line["splits"]) > 1}
    # A cell names its box policy where that line's policy changes along the history.
    mixed = {c["series"] for c in chart["policy_changes"]}
    table = [
        {
            "version": chart["versions"][i],
            "url": reverse("version", args=[chart["versions"][i]["id"]]),
            "state": badges[chart["versions"][i]["id"]],
            "values": [
                (
                    line["values"][i],
                    line["revisions"][i] if line["name"] in several else None,
                    line["box_policies"][i] if line["name"] in mixed else None,
                )
                for line in chart["series"]
            ],
        }
        for i in rows
    ]
    return render(
        request,
        "frontend/detector.html",
        {
            "detector": found,
            "chart": chart,
            "views": selectors.REVISION_VIEWS,
            "source": reverse("api:history", args=[found.pk]),
            "table": table,
            "rows": rows,
            "error": error,
            "can_upload": selectors.role_in(request.user, found.team) in selectors.UPLOAD_ROLES,
        },
        status=400 if error else 200,
    )


@login_required
def new_detector(request):
    from releases import detectors, suites

    teams = selectors.lead_teams(request.user)
    if not teams:
        raise PermissionDenied("only leads of a team can create its detectors")
    splits = sorted({s.name for s in BenchmarkSplit.objects.all()})
    template = {
        "splits": [{"name": n, "revision": None} for n in splits],
        "protocols": ["coco"],
        "box_policy": "keep",
        "unknown_classes": "drop",
        "score_threshold": 0.5,
        "class_thresholds": {},
    }
    data = {
        "team": request.POST.get("team", str(teams[0].pk)),
        "name": request.POST.get("name", ""),
        "classes": request.POST.get("classes", ""),
        "description": request.POST.get("description", ""),
        "suite": request.POST.get("suite") or json.dumps(template, indent=2),
    }
    error = None
    if request.method == "POST":
        team = next((t for t in teams if str(t.pk) == data["team"]), None)
        try:
            if team is None:
                raise detectors.DetectorError("team: choose one of the teams you lead")
            try:
                spec = json.loads(data["suite"])
            except json.JSONDecodeError as e:
                raise detectors.DetectorError(
                    f"suite: not valid JSON: {e.msg} at line {e.lineno}, column {e.colno}"
                ) from None
            found = detectors.create_detector(
                request.user,
                team,
                data["name"],
                data["classes"],
                spec,
                description=data["description"],
            )
        except (detectors.DetectorError, suites.SuiteError, UploadError) as e:
            error = str(e)
        else:
            messages.success(
                request, f"{found} created with suite v{suites.current_suite(found).number}"
            )
            return redirect("detector", detector_id=found.pk)
    return render(
        request,
        "frontend/new_detector.html",
        {"teams": teams, "data": data, "error": error},
        status=400 if error else 200,
    )
