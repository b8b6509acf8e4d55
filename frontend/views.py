"""Pages. Views parse input, call one service or selector, and render."""

import json

from django.conf import settings
from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied
from django.http import Http404, JsonResponse
from django.shortcuts import redirect, render
from django.urls import reverse
from django.utils.html import json_script

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit, Evaluation
from evaluation.services import UploadConflict, UploadError
from releases import selectors, services
from releases.models import Detector, ModelVersion

from .forms import PredictionsForm, SplitForm


def _detector_or_404(user, detector_id):
    try:
        return selectors.detector_for(user, detector_id)
    except Detector.DoesNotExist:
        raise Http404("no such detector") from None


def _version_or_404(user, version_id):
    try:
        return selectors.version_for(user, version_id)
    except ModelVersion.DoesNotExist:
        raise Http404("no such version") from None


@login_required
def overview(request):
    return render(
        request,
        "frontend/overview.html",
        {
            "rows": selectors.overview_for(request.user),
            "can_create": bool(selectors.lead_teams(request.user)),
        },
    )


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
    chart = selectors.history_chart(found)
    for entry in chart["versions"]:
        entry["url"] = reverse("version", args=[entry["id"]])
    table = [
        {
            "version": v,
            "values": [chart["values"][str(s["id"])]["AP"]["mean"][i] for s in chart["splits"]],
        }
        for i, v in enumerate(chart["versions"])
    ]
    return render(
        request,
        "frontend/detector.html",
        {
            "detector": found,
            "chart": chart,
            "table": list(reversed(table)),
            "can_upload": selectors.role_in(request.user, found.team) in selectors.UPLOAD_ROLES,
        },
    )


@login_required
def version(request, version_id):
    found = _version_or_404(request.user, version_id)
    shown = request.GET.get("judgement", "")
    judgement_id = int(shown) if shown.isdigit() else None
    splits = selectors.version_scorecards(found)
    for entry in splits:
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
            **selectors.verdict_page(found, judgement_id),
            "caution": selectors.CAUTION,
        },
    )


@login_required
def compare(request, detector_id):
    found = _detector_or_404(request.user, detector_id)
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
            "caution": selectors.CAUTION,
        },
    )


@login_required
def compare_intervals(request, detector_id):
    """Queue the ΔAP intervals of the chosen pair (reload the page to see them)."""
    from releases import comparisons

    found = _detector_or_404(request.user, detector_id)
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


@login_required
def release_criteria(request, detector_id):
    from releases import criteria

    found = _detector_or_404(request.user, detector_id)
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
def evidence(request, version_id):
    found = _version_or_404(request.user, version_id)
    report = selectors.evidence_for(found)
    if request.path.endswith(".json"):
        return JsonResponse(report, json_dumps_params={"indent": 2})
    return render(request, "frontend/evidence.html", {"report": report, "version": found})


@login_required
def sign_off(request, version_id):
    found = _version_or_404(request.user, version_id)
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
            "usage": selectors.split_usage(request.user, found),
            "class_counts": [(c, found.class_counts.get(c)) for c in found.classes],
            "tags": sorted(found.tags.items()),
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


@login_required
def api_tokens(request):
    from releases import tokens

    new_token, error = None, None
    if request.method == "POST":
        if request.POST.get("action") == "revoke":
            try:
                tokens.revoke_token(request.user, int(request.POST.get("token", 0)))
            except (ValueError, PermissionDenied):
                raise Http404("no such token") from None
            messages.success(request, "token revoked")
            return redirect("tokens")
        try:
            row, token = tokens.create_token(request.user, request.POST.get("name", ""))
        except UploadError as e:
            error = str(e)
        else:
            new_token = {"row": row, "token": token}
    response = render(
        request,
        "frontend/tokens.html",
        {"tokens": request.user.api_tokens.all(), "new_token": new_token, "error": error},
        status=400 if error else 200,
    )
    response["Cache-Control"] = "no-store"  # it may hold a new token
    return response


@login_required
def webhook(request, detector_id):
    from releases import notify

    found = _detector_or_404(request.user, detector_id)
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
    from releases import audit
    from releases.models import AuditEvent

    choices = selectors.detector_choices(request.user)
    filters, errors = _parse_filters(request.GET, choices)
    trail = selectors.audit_trail(request.user, **filters)
    for entry in trail["events"]:
        link = entry["link"]
        if link:
            link["url"] = reverse(link["page"], args=[link["id"]])
    broken, head, count = audit.verify_audit()
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
            "chain": {"intact": broken is None, "broken": broken, "head": head, "count": count},
            "query": query.urlencode(),
        },
        status=400 if errors else 200,
    )


@login_required
def suite(request, detector_id):
    from releases import suites

    found = _detector_or_404(request.user, detector_id)
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
