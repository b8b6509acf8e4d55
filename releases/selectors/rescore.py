"""The re-score page and API: the revisions a detector's predictions could move to, and
its re-scored prediction sets with their evaluations and dropped detections."""

from ..models import Membership, PredictionSet


def rescore_choices(detector):
    """For each split name the detector's versions have current predictions on: its
    newest revision and the versions with predictions on an earlier revision but none
    on it (what a re-score would add). Newest names first; a fixed number of queries."""
    from evaluation.models import BenchmarkSplit

    sets = list(
        PredictionSet.objects.current()
        .filter(version__detector=detector)
        .values_list("version_id", "version__label", "split__name", "split__revision")
    )
    names = {name for _, _, name, _ in sets}
    newest = {}
    for split in BenchmarkSplit.objects.filter(name__in=names).order_by("name", "revision"):
        newest[split.name] = split
    out = []
    for name in sorted(names):
        target = newest[name]
        on_target = {v for v, _, n, r in sets if n == name and r == target.revision}
        behind = sorted(
            {(v, label) for v, label, n, r in sets if n == name and r < target.revision}
            - {(v, label) for v, label, n, r in sets if v in on_target}
        )
        out.append({"split": target, "behind": [{"id": v, "label": lb} for v, lb in behind]})
    return out


def rescored_sets(detector):
    """The detector's current re-scored sets, newest first: version, split, the set it
    came from, original uploader and time, who re-scored and when, and each evaluation
    (protocol, state, error, detections dropped for images the revision no longer has)."""
    from evaluation.models import Scorecard

    rows = list(
        PredictionSet.objects.current()
        .filter(version__detector=detector, rescored_from__isnull=False)
        .select_related("version", "split", "rescored_from__split", "uploaded_by", "rescored_by")
        .order_by("-rescored_at", "-pk")
    )
    links = list(
        PredictionSet.evaluations.through.objects.filter(
            predictionset_id__in=[ps.pk for ps in rows]
        ).select_related("evaluation")
    )
    dropped = dict(
        Scorecard.objects.filter(
            evaluation_id__in=[link.evaluation_id for link in links]
        ).values_list("evaluation_id", "result__counts__dropped_unknown_images")
    )
    evaluations = {}
    for link in sorted(links, key=lambda lk: (lk.evaluation.protocol, lk.evaluation_id)):
        e = link.evaluation
        evaluations.setdefault(link.predictionset_id, []).append(
            {
                "id": e.pk,
                "protocol": e.protocol,
                "state": e.state,
                "error": e.error,
                "dropped": dropped.get(e.pk),
            }
        )
    return [
        {
            "prediction_set": ps.pk,
            "version": {"id": ps.version_id, "label": ps.version.label},
            "split": {"id": ps.split_id, "name": ps.split.name, "revision": ps.split.revision},
            "from": {
                "prediction_set": ps.rescored_from_id,
                "split": str(ps.rescored_from.split),
            },
            "file_name": ps.file_name,
            "uploaded_by": ps.uploaded_by.get_username(),
            "uploaded_at": ps.uploaded_at,
            "rescored_by": ps.rescored_by.get_username() if ps.rescored_by else None,
            "rescored_at": ps.rescored_at,
            "evaluations": evaluations.get(ps.pk, []),
        }
        for ps in rows
    ]


def can_rescore(user, detector):
    from .access import role_in

    return role_in(user, detector.team) == Membership.Role.LEAD
