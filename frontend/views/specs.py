"""The versioned specifications of a detector: release criteria, benchmark suite, webhook."""

import json

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.shortcuts import redirect, render

from releases import selectors

from .lookup import detector_or_404


@login_required
def release_criteria(request, detector_id):
    from releases import criteria

    found = detector_or_404(request.user, detector_id)
    current = criteria.current_criteria(found)
    text = request.POST.get("rules") or json.dumps(current.rules if current else [], indent=2)
    error = None
    if request.method == "POST":
        try:
            criteria.set_criteria(found, request.user, json.loads(text))
        except json.JSONDecodeError as e:
            error = f"rules: not valid JSON: {e.msg} at line {e.lineno}, column {e.colno}"
        except RecursionError:  # the decoder recurses: [[[[… thousands deep
            error = "rules: not valid JSON: nested too deeply"
        except criteria.CriteriaError as e:
            error = str(e)
        else:
            messages.success(request, f"criteria of {found} saved as a new version")
            return redirect("criteria", detector_id=found.pk)
    return render(
        request,
        "frontend/criteria.html",
        {
            "detector": found,
            "current": current,
            "text": text,
            "error": error,
            "history": selectors.spec_history(
                found.criteria.select_related("created_by"), lambda row: row.rules
            ),
            "can_edit": selectors.role_in(request.user, found.team) == "lead",
        },
        status=400 if error else 200,
    )


@login_required
def suite(request, detector_id):
    from releases import suites

    found = detector_or_404(request.user, detector_id)
    current = suites.current_suite(found)
    shown = suites.as_dict(current) if current else {}
    text = request.POST.get("suite") or json.dumps(shown, indent=2)
    error = None
    if request.method == "POST":
        try:
            suites.set_suite(found, request.user, json.loads(text))
        except json.JSONDecodeError as e:
            error = f"suite: not valid JSON: {e.msg} at line {e.lineno}, column {e.colno}"
        except suites.SuiteError as e:
            error = str(e)
        else:
            messages.success(
                request,
                f"suite of {found} saved as a new version; undecided candidates are judged again",
            )
            return redirect("suite", detector_id=found.pk)
    return render(
        request,
        "frontend/suite.html",
        {
            "detector": found,
            "current": current,
            "required": suites.required_splits(found),
            "thresholds": suites.deployed_thresholds(current, found.classes) if current else [],
            "custom": [
                (name, json.dumps(definition, indent=2))
                for name, definition in suites.custom_definitions(current).items()
            ],
            "text": text,
            "error": error,
            "history": selectors.spec_history(
                found.suites.select_related("created_by"), suites.as_dict
            ),
            "can_edit": selectors.role_in(request.user, found.team) == "lead",
        },
        status=400 if error else 200,
    )


@login_required
def webhook(request, detector_id):
    from releases import notify

    found = detector_or_404(request.user, detector_id)
    if request.method != "POST":
        return redirect("criteria", detector_id=found.pk)
    url = request.POST.get("url", "").strip()
    try:
        secret = request.POST.get("secret") or found.webhook_secret  # empty: keep the old one
        notify.set_webhook(found, request.user, url, secret)
    except ValueError as e:
        messages.error(request, f"webhook: {e}")
    else:
        messages.success(request, f"webhook of {found} {'set' if url else 'removed'}")
    return redirect("criteria", detector_id=found.pk)
