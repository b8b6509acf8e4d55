"""Baselines, badges and rule outcomes. The verdict itself: ``releases.verdicts``."""


def baseline_of(detector):
    """The detector's baseline: its most recently approved version, or None."""
    from ..models import ModelVersion

    return (
        ModelVersion.objects.filter(detector=detector, sign_off__decision="approved")
        .order_by("-sign_off__decided_at")
        .first()
    )


def baselines_of(detectors):
    """{detector id: its baseline version (id and detector id only)}, in one query:
    for each detector the approved version decided last, as ``baseline_of``."""
    from ..models import ModelVersion

    approved = ModelVersion.objects.filter(
        detector__in=detectors, sign_off__decision="approved"
    ).order_by("sign_off__decided_at")
    return {v.detector_id: v for v in approved.only("id", "detector_id")}


def _has_decision(version, model):
    try:
        return version.sign_off is not None
    except model.DoesNotExist:
        return False


def _undecided_states(versions):
    """{version id: verdict state} of the undecided versions among these, from
    ``verdicts.verdicts_of`` (a fixed number of queries; a stale judgement reads
    ``judging``, never its old verdict)."""
    from ..models import SignOff
    from ..verdicts import verdicts_of

    undecided = [v for v in versions if not _has_decision(v, SignOff)]
    return {pk: verdict.state for pk, verdict in verdicts_of(undecided).items()}


def blocked_versions(versions):
    """Ids of the undecided versions among these whose current verdict is final and not
    a pass (regression or incomplete)."""
    states = _undecided_states(list(versions))
    return {pk for pk, state in states.items() if state in ("regression", "incomplete")}


def state_of(version, baseline, blocked=()):
    """The badge of a version: baseline, signed off, rejected, blocked or candidate."""
    decision = getattr(getattr(version, "sign_off", None), "decision", None)
    if baseline is not None and version.pk == baseline.pk:
        return "baseline"
    if decision == "approved":
        return "signed off"
    if decision == "rejected":
        return "rejected"
    return "blocked" if version.pk in blocked else "candidate"


def version_badges(versions):
    """{version id: badge} for the pages' lists and charts: a decided version's decision
    (baseline, approved, rejected), else its current verdict (scoring, judging,
    incomplete, regression, pass) from ``verdicts.verdicts_of``, in a fixed number of
    queries. Versions should come with ``select_related("sign_off")``."""
    from ..models import SignOff

    versions = list(versions)
    baselines = baselines_of({v.detector_id for v in versions})
    states = _undecided_states(versions)
    out = {}
    for v in versions:
        try:
            decision = v.sign_off.decision
        except SignOff.DoesNotExist:
            decision = None
        base = baselines.get(v.detector_id)
        if base is not None and base.pk == v.pk:
            out[v.pk] = "baseline"
        else:
            out[v.pk] = decision or states[v.pk]
    return out


def version_states(versions):
    """{version id: badge} for many versions of any detectors (API): baseline, signed
    off, rejected, blocked (current verdict regression or incomplete) or candidate."""
    versions = list(versions)
    baselines = baselines_of({v.detector_id for v in versions})
    blocked = blocked_versions(versions)
    return {v.pk: state_of(v, baselines.get(v.detector_id), blocked) for v in versions}


def outcomes_of(version, judgement):
    """The judged rules of ``judgement`` (a judgement of ``version``; None, e.g. the
    current verdict has none yet: no outcomes, never a stale judgement's), failures
    first."""
    from ..models import Outcome

    if judgement is None:
        return []
    order = {"fail": 0, "missing": 0, "not significant": 1, "no data": 2, "pass": 3}
    rows = list(
        Outcome.objects.filter(judgement=judgement).select_related("split", "criteria", "baseline")
    )
    return sorted(
        rows, key=lambda o: (order.get(o.status, 9), o.rule_index, o.split.name, o.class_name)
    )


def verdict_summary(verdict):
    """A ``releases.verdicts.Verdict`` as JSON (evidence report)."""
    judgement = verdict.judgement
    return {
        "state": verdict.state,
        "final": verdict.final,
        "no_criteria": verdict.no_criteria,
        "decided": verdict.decided,
        "reasons": verdict.reasons,
        "missing": verdict.missing,
        "judgement": None
        if judgement is None
        else {
            "id": judgement.pk,
            "judged_at": judgement.judged_at.isoformat(),
            "criteria_version": judgement.criteria.number if judgement.criteria else None,
            "suite_version": judgement.suite.number if judgement.suite else None,
            "baseline": judgement.baseline.label if judgement.baseline else None,
        },
    }
