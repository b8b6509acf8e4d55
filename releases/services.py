"""Business logic of releases: who may do what, versions, prediction uploads."""

from django.core.exceptions import PermissionDenied
from django.db import IntegrityError, transaction
from django.utils import timezone
from django.utils.text import slugify

from evaluation import services as evaluation_services
from evaluation.services import UploadError

from .models import Detector, Membership, ModelVersion, PredictionSet, Team

UPLOAD_ROLES = (Membership.Role.ENGINEER, Membership.Role.LEAD)


# Selectors: what a user may see ---------------------------------------------------


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


def require_upload_right(user, detector):
    if role_in(user, detector.team) not in UPLOAD_ROLES:
        raise PermissionDenied(
            f"{user} may not upload for {detector}: only engineers and leads of {detector.team} can"
        )


# Writes ---------------------------------------------------------------------------


def create_team(name, members=()):
    """A team and its memberships: ``members`` is a list of (user, role)."""
    with transaction.atomic():
        team = Team.objects.create(name=name, slug=slugify(name))
        for user, role in members:
            Membership.objects.create(team=team, user=user, role=role)
    return team


def create_detector(team, name, classes, *, protocols=("coco",), description=""):
    if not classes or len(set(classes)) != len(classes):
        raise UploadError("a detector needs a list of distinct class names")
    for protocol in protocols:
        evaluation_services.engine.get_protocol(protocol)
    return Detector.objects.create(
        team=team,
        name=name,
        slug=slugify(name),
        classes=list(classes),
        primary_protocol=protocols[0],
        protocols=list(protocols),
        description=description,
    )


def create_version(
    detector, label, user, *, source_commit="", training_ref="", notes="", created_at=None
):
    """Register a trained model of ``detector``; labels are unique per detector."""
    require_upload_right(user, detector)
    label = label.strip()
    if not label:
        raise UploadError("a version needs a label")
    try:
        with transaction.atomic():
            return ModelVersion.objects.create(
                detector=detector,
                label=label,
                source_commit=source_commit,
                training_ref=training_ref,
                notes=notes,
                created_by=user,
                created_at=created_at or timezone.now(),
            )
    except IntegrityError:
        raise UploadError(f"{detector} already has a version labelled {label!r}") from None


def submit_predictions(version, split, uploaded, user):
    """Store a version's predictions on a split and queue their evaluations.

    The identical file again returns the same prediction set; a different file for
    a version and split that already have one is refused (make a new version).
    """
    require_upload_right(user, version.detector)
    prediction_file = evaluation_services.store_predictions(uploaded)
    with transaction.atomic():
        existing = PredictionSet.objects.filter(version=version, split=split).first()
        if existing is not None:
            if existing.predictions_id != prediction_file.pk:
                raise UploadError(
                    f"{version} already has other predictions on {split}; "
                    "upload them as a new version"
                )
            return existing
        prediction_set = PredictionSet.objects.create(
            version=version, split=split, predictions=prediction_file, uploaded_by=user
        )
        evaluation_services.request_evaluations(split, prediction_file, version.detector.protocols)
    return prediction_set


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


def submit_for_label(detector, label, split, uploaded, user, **version_fields):
    """``submit_predictions`` for a version named by label, created if new; a refused
    upload leaves no new version behind."""
    with transaction.atomic():
        version = ModelVersion.objects.filter(detector=detector, label=label.strip()).first()
        if version is None:
            version = create_version(detector, label, user, **version_fields)
        return submit_predictions(version, split, uploaded, user)
