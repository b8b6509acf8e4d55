"""Baselines, badges, rule outcomes and the verdict a pipeline waits for."""

from .access import evaluations_of


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


def blocked_versions(versions):
    """Ids of the undecided versions among these that fail a release rule."""
    from ..models import Outcome

    return set(
        Outcome.objects.filter(
            version__in=versions, status=Outcome.Status.FAIL, version__sign_off=None
        ).values_list("version_id", flat=True)
    )


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


def version_states(versions):
    """{version id: badge} for many versions of any detectors, in three queries."""
    versions = list(versions)
    baselines = baselines_of({v.detector_id for v in versions})
    blocked = blocked_versions(versions)
    return {v.pk: state_of(v, baselines.get(v.detector_id), blocked) for v in versions}


def outcomes_of(version):
    """The version's judged rules, failures first."""
    from ..models import Outcome

    order = {"fail": 0, "not significant": 1, "no data": 2, "pass": 3}
    rows = list(
        Outcome.objects.filter(version=version).select_related("split", "criteria", "baseline")
    )
    return sorted(
        rows, key=lambda o: (order.get(o.status, 9), o.rule_index, o.split.name, o.class_name)
    )


def verdict_of(version):
    """What a pipeline waits for: whether scoring and judging are over, and the result.

    ``pending`` until every evaluation has finished and the criteria were applied
    after the last of them; then ``evaluation failed``, ``regression`` (a rule fails),
    ``no criteria`` or ``no regression``.
    """
    from ..models import Outcome

    evaluations = evaluations_of(version)
    outcomes = list(Outcome.objects.filter(version=version).values_list("status", flat=True))
    counts = {status: outcomes.count(status) for status in Outcome.Status.values}
    done = [e.finished_at for e in evaluations if e.finished and e.finished_at]
    if not evaluations:
        verdict = "no predictions"
    elif len(done) < len(evaluations) or version.judged_at is None or version.judged_at < max(done):
        verdict = "pending"
    elif any(e.state == "failed" for e in evaluations):
        verdict = "evaluation failed"
    elif counts["fail"]:
        verdict = "regression"
    elif not outcomes and version.detector.criteria.count() == 0:
        verdict = "no criteria"
    else:
        verdict = "no regression"
    return {"verdict": verdict, "evaluations": evaluations, "outcome_counts": counts}
