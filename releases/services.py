"""Business logic of releases: who may do what, versions, prediction uploads."""

from django.core.exceptions import PermissionDenied
from django.db import IntegrityError, transaction
from django.utils import timezone
from django.utils.text import slugify

from evaluation import services as evaluation_services
from evaluation.services import UploadError

from . import audit, selectors
from .models import AuditEvent, Detector, Membership, ModelVersion, PredictionSet, Team
from .selectors import UPLOAD_ROLES


def require_upload_right(user, detector):
    if selectors.role_in(user, detector.team) not in UPLOAD_ROLES:
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
        audit.record_event(
            AuditEvent.Kind.PREDICTIONS_UPLOADED,
            user,
            f"prediction-set:{prediction_set.pk}",
            {
                "version": str(version),
                "split": str(split),
                "sha256": prediction_file.sha256,
                "size": prediction_file.size,
                "file": prediction_file.original_name,
            },
        )
        evaluation_services.request_evaluations(split, prediction_file, version.detector.protocols)
    return prediction_set


def submit_for_label(detector, label, split, uploaded, user, **version_fields):
    """``submit_predictions`` for a version named by label, created if new; a refused
    upload leaves no new version behind."""
    with transaction.atomic():
        version = ModelVersion.objects.filter(detector=detector, label=label.strip()).first()
        if version is None:
            version = create_version(detector, label, user, **version_fields)
        return submit_predictions(version, split, uploaded, user)
