"""Reads that pages need: what a user may see, and the data of each page.

Every function here does a fixed number of queries, whatever the number of versions.
"""

from .models import Detector, Membership, PredictionSet, Team

UPLOAD_ROLES = (Membership.Role.ENGINEER, Membership.Role.LEAD)


def visible_teams(user):
    """Members see their teams; anyone holding a reviewer role reads every team."""
    if not user.is_authenticated:
        return Team.objects.none()
    if (
        user.is_superuser
        or Membership.objects.filter(user=user, role=Membership.Role.REVIEWER).exists()
    ):
        return Team.objects.all()
    return Team.objects.filter(memberships__user=user)


def visible_detectors(user):
    return Detector.objects.filter(team__in=visible_teams(user)).select_related("team")


def role_in(user, team):
    membership = Membership.objects.filter(user=user, team=team).first()
    return membership.role if membership else None


def detector_for(user, detector_id):
    """The detector if ``user`` may see it, else ``Detector.DoesNotExist``."""
    return visible_detectors(user).get(pk=detector_id)


def history_for(detector):
    """Versions of a detector, newest first, with their prediction sets and the
    evaluations of each (one query per level, no N+1)."""
    from evaluation.models import Evaluation

    versions = list(
        detector.versions.order_by("-created_at").prefetch_related("prediction_sets__split")
    )
    sets = [ps for v in versions for ps in v.prediction_sets.all()]
    evaluations = Evaluation.objects.filter(
        predictions_id__in={ps.predictions_id for ps in sets},
        split_id__in={ps.split_id for ps in sets},
    ).select_related("scorecard")
    by_input = {}
    for evaluation in evaluations:
        by_input.setdefault((evaluation.predictions_id, evaluation.split_id), []).append(evaluation)
    rows = []
    for version in versions:
        entries = []
        for ps in sorted(
            version.prediction_sets.all(), key=lambda p: (p.split.name, p.split.revision)
        ):
            found = sorted(
                by_input.get((ps.predictions_id, ps.split_id), []), key=lambda e: e.protocol
            )
            entries.append({"prediction_set": ps, "evaluations": found})
        rows.append({"version": version, "entries": entries})
    return rows


def evaluation_for(user, evaluation_id):
    """An evaluation the user may see: one of a visible detector's prediction sets."""
    from evaluation.models import Evaluation

    evaluation = Evaluation.objects.select_related("split", "predictions").get(pk=evaluation_id)
    visible = PredictionSet.objects.filter(
        predictions_id=evaluation.predictions_id,
        split_id=evaluation.split_id,
        version__detector__in=visible_detectors(user),
    ).exists()
    if not visible:
        raise Evaluation.DoesNotExist
    return evaluation


def can_load_splits(user):
    """Splits are shared benchmarks: engineers and leads of any team may load them."""
    return user.is_superuser or Membership.objects.filter(user=user, role__in=UPLOAD_ROLES).exists()


