"""The reviewer-facing audit trail page."""

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.shortcuts import redirect, render
from django.urls import reverse

from releases import selectors


def _parse_filters(params, choices):
    """The audit page's filters from the query string; errors name the field."""
    import datetime

    from django.utils import timezone

    from releases.models import AuditEvent

    filters, errors = {}, []
    by_detector = {str(d.pk): d for d, _ in choices}
    by_version = {str(v.pk): v for _, versions in choices for v in versions}
    if params.get("detector"):
        filters["detector"] = by_detector.get(params["detector"])
        if filters["detector"] is None:
            errors.append("detector: no such detector")
    if params.get("version"):
        filters["version"] = by_version.get(params["version"])
        if filters["version"] is None:
            errors.append("version: no such version")
    if params.get("kind"):
        if params["kind"] not in AuditEvent.Kind.values:
            errors.append(f"kind: must be one of {', '.join(AuditEvent.Kind.values)}")
        else:
            filters["kind"] = params["kind"]
    filters["actor"] = params.get("actor", "").strip()[:150]
    for name, shift in (("since", 0), ("until", 1)):  # until: the whole day is included
        raw = params.get(name, "")
        if raw:
            try:
                day = datetime.date.fromisoformat(raw)
            except ValueError:
                errors.append(f"{name}: not a date (YYYY-MM-DD): {raw!r}")
            else:
                start = datetime.datetime.combine(
                    day + datetime.timedelta(days=shift), datetime.time()
                )
                filters[name] = timezone.make_aware(start)
    if params.get("before", "").isdigit():
        filters["before"] = int(params["before"])
    return filters, errors


@login_required
def audit_trail(request):
    from releases.models import AuditEvent

    choices = selectors.detector_choices(request.user)
    filters, errors = _parse_filters(request.GET, choices)
    trail = selectors.audit_trail(request.user, **filters)
    for entry in trail["events"]:
        link = entry["link"]
        if link:
            link["url"] = reverse(link["page"], args=[link["id"]])
    query = request.GET.copy()
    query.pop("before", None)
    return render(
        request,
        "frontend/audit.html",
        {
            "trail": trail,
            "choices": choices,
            "kinds": AuditEvent.Kind.values,
            "params": request.GET,
            "errors": errors,
            "check": selectors.last_verification(request.user),
            "query": query.urlencode(),
        },
        status=400 if errors else 200,
    )


@login_required
def verify_audit(request):
    """POST: run the full verification now (reviewers), then show the audit page."""
    from releases import audit_check

    if request.method != "POST":
        return redirect("audit")
    report, _ = audit_check.verify_now(request.user)
    if report.ok:
        messages.success(request, f"audit trail verified: {report.count} events, no findings")
    else:
        messages.error(request, f"audit verification: {len(report.problems)} finding(s)")
    return redirect("audit")
