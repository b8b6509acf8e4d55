"""A version's decision page, its evidence report and the sign-off form's target."""

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.http import JsonResponse
from django.shortcuts import redirect, render
from django.utils.html import json_script

from releases import selectors, services
from releases.selectors import errors

from .lookup import version_or_404
from .miss_rate import embed


@login_required
def version(request, version_id):
    found = version_or_404(request.user, version_id)
    shown = request.GET.get("judgement", "")
    judgement_id = int(shown) if shown.isdigit() else None
    page = selectors.verdict_page(found, judgement_id)
    suite = selectors.shown_suite(found, page["verdict"])
    splits = selectors.version_scorecards(found, suite)
    for entry in splits:
        embed(entry)
        if entry["card"]:
            per_class = entry["card"].result["per_class"]
            data = {
                # JSON columns may not keep key order (PostgreSQL jsonb): use the split's.
                "series": [c for c in entry["split"].classes if c in per_class],
                "classes": {"all": {name: row["curve"] for name, row in per_class.items()}},
            }
            entry["curves_script"] = json_script(data, f"curves-data-{entry['split'].pk}")
    return render(
        request,
        "frontend/version.html",
        {
            "version": found,
            "detector": found.detector,
            "splits": splits,
            "evaluations": selectors.evaluations_of(found),
            "replaced": selectors.replaced_sets(found),
            "decision": getattr(found, "sign_off", None),
            "can_sign_off": selectors.role_in(request.user, found.detector.team) == "lead",
            "badge": selectors.version_badges([found])[found.pk],
            "suite": suite,
            **page,
            "caution": selectors.CAUTION,
            "errors": {e["split"].pk: e for e in errors.version_breakdowns(found)},
        },
    )


@login_required
def evidence(request, version_id):
    found = version_or_404(request.user, version_id)
    report = selectors.evidence_for(found)
    if request.path.endswith(".json"):
        return JsonResponse(report, json_dumps_params={"indent": 2})
    return render(request, "frontend/evidence.html", {"report": report, "version": found})


@login_required
def sign_off(request, version_id):
    found = version_or_404(request.user, version_id)
    if request.method != "POST":
        return redirect("version", version_id=found.pk)
    try:
        services.sign_off(
            found,
            request.user,
            request.POST.get("decision", ""),
            request.POST.get("comment", ""),
            justification=request.POST.get("justification", ""),
        )
    except services.DecisionError as e:
        messages.error(request, str(e))
        return redirect("version", version_id=found.pk)
    messages.success(request, f"decision on {found} recorded")
    return redirect("version", version_id=found.pk)
