"""The overview and the split page."""

from django.db.models import Q

from ..models import PredictionSet
from .access import visible_detectors
from .decisions import version_badges
from .scores import _scorecards

CANDIDATES_SHOWN = 3


def _candidates(detectors, baseline):
    """{detector id: up to three undecided versions newer than its baseline, newest
    first, each with its current verdict and how many uploads were replaced}."""
    from .. import verdicts
    from ..models import ModelVersion

    chosen = {d.pk: [] for d in detectors}
    newer = Q(pk__in=[])
    for d in detectors:
        base = baseline[d.pk]
        newer |= Q(detector=d.pk, **({"created_at__gt": base.created_at} if base else {}))
    undecided = ModelVersion.objects.filter(newer, sign_off=None).order_by("-created_at", "-id")
    # Ids first (no datetimes built for every undecided version), objects for the chosen.
    for pk, detector_id in undecided.values_list("pk", "detector_id"):
        if len(chosen[detector_id]) < CANDIDATES_SHOWN:
            chosen[detector_id].append(pk)
    objects = ModelVersion.objects.select_related("detector").in_bulk(
        [pk for shown in chosen.values() for pk in shown]
    )
    out = {detector_id: [objects[pk] for pk in shown] for detector_id, shown in chosen.items()}
    versions = [v for shown in out.values() for v in shown]
    replaced = {}
    for version_id in PredictionSet.objects.filter(
        version__in=versions, replaced_by__isnull=False
    ).values_list("version_id", flat=True):
        replaced[version_id] = replaced.get(version_id, 0) + 1
    found = verdicts.verdicts_of(versions)  # every candidate shown, one reading
    return {
        detector_id: [
            {"version": v, "verdict": found[v.pk], "replaced": replaced.get(v.pk, 0)} for v in shown
        ]
        for detector_id, shown in out.items()
    }


def overview_for(user):
    """For each visible detector: its baseline, its newest candidates with their
    verdicts, headline AP per split, and evaluations still queued or running."""
    from evaluation.models import Evaluation

    from ..models import ModelVersion

    detectors = list(visible_detectors(user).order_by("team__name", "name"))
    newest = {d.pk: None for d in detectors}
    baseline = {d.pk: None for d in detectors}
    versions = ModelVersion.objects.filter(detector__in=detectors).order_by("created_at")
    for pk, detector_id in versions.values_list("pk", "detector_id"):  # tuples, not objects
        newest[detector_id] = pk
    objects = ModelVersion.objects.select_related("sign_off").in_bulk(
        [pk for pk in newest.values() if pk]
    )
    newest = {detector_id: objects.get(pk) for detector_id, pk in newest.items()}
    for version in (
        ModelVersion.objects.filter(detector__in=detectors, sign_off__decision="approved")
        .select_related("sign_off")
        .order_by("sign_off__decided_at")
    ):
        baseline[version.detector_id] = version
    shown = [v for v in [*newest.values(), *baseline.values()] if v]
    badges = version_badges(shown)
    candidates = _candidates(detectors, baseline)
    sets = list(
        PredictionSet.objects.current().filter(version__in=shown).select_related("split", "version")
    )

    protocols = {d.primary_protocol for d in detectors}
    cards = _scorecards(sets, protocols)
    all_sets = PredictionSet.objects.current().filter(version__detector__in=detectors)
    # Pending evaluations by the detector whose sets asked for them (never another
    # team's evaluation of identical bytes).
    links = PredictionSet.evaluations.through.objects.filter(
        predictionset__in=all_sets, evaluation__state__in=["queued", "running"]
    ).values_list("evaluation_id", "predictionset__version__detector_id")
    owners = {}
    for evaluation_id, detector_id in links:
        owners.setdefault(evaluation_id, set()).add(detector_id)
    pending = Evaluation.objects.filter(pk__in=list(owners)).select_related("split")
    ap = {}
    for (set_id, _), card in cards.items():
        ap[set_id] = card.summary.get("AP")
    out = []
    for detector in detectors:
        version, base = newest[detector.pk], baseline[detector.pk]
        by_split = {}
        for ps in sets:
            if ps.version_id in {getattr(version, "pk", None), getattr(base, "pk", None)}:
                row = by_split.setdefault(
                    ps.split, {"split": ps.split, "candidate": None, "baseline": None}
                )
                if version and ps.version_id == version.pk:
                    row["candidate"] = ap.get(ps.pk)
                if base and ps.version_id == base.pk:
                    row["baseline"] = ap.get(ps.pk)
        headline = [by_split[k] for k in sorted(by_split, key=lambda s: (s.name, s.revision))]
        running = [e for e in pending if detector.pk in owners[e.pk]]
        out.append(
            {
                "detector": detector,
                "newest": version,
                "baseline": base,
                "newest_state": badges[version.pk] if version else None,
                "candidates": candidates[detector.pk],
                "headline": headline,
                "pending": running,
            }
        )
    return out


def split_usage(user, split):
    """Versions of visible detectors that were scored on ``split``, as
    ``{"id", "detector", "label"}`` (rows as tuples: the list grows with versions)."""
    rows = (
        PredictionSet.objects.current()
        .filter(split=split, version__detector__in=visible_detectors(user))
        .order_by("version__detector__name", "version__created_at")
        .values_list("version_id", "version__detector__name", "version__label")
    )
    return [{"id": pk, "detector": name, "label": label} for pk, name, label in rows]
