"""Re-scoring a detector's stored predictions on a new revision of a split.

``rescore(detector, user, split, versions=None)`` is the one writer: the page, the API
(``POST /api/v1/detectors/<id>/rescore/``) and ``manage.py rescore`` call it. For each
version it takes the version's current prediction set on the newest *earlier*
revision of the split's name and records a new set on ``split`` with the same stored
file (``rescored_from``; the original uploader and upload time kept, who re-scored and
when recorded, a ``predictions re-scored`` audit event), whose evaluations drop the
detections of images the new revision no longer holds and count them
(``Evaluation.unknown_images = "drop"``; uploads never drop). Running it again creates
nothing: a version that already has predictions on ``split`` is skipped, with the reason.
"""

from dataclasses import dataclass, field

from django.core.exceptions import PermissionDenied
from django.db import transaction
from django.utils import timezone

from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError

from . import audit, selectors
from .models import AuditEvent, Membership, ModelVersion, PredictionSet, SignOff


@dataclass
class Outcome:
    """What happened to one version: ``rescored`` (a new set) or ``skipped`` (why)."""

    version: ModelVersion
    status: str
    reason: str = ""
    prediction_set: PredictionSet | None = None
    source: PredictionSet | None = None


@dataclass
class Result:
    split: BenchmarkSplit
    outcomes: list = field(default_factory=list)

    @property
    def rescored(self):
        return [o for o in self.outcomes if o.status == "rescored"]

    @property
    def skipped(self):
        return [o for o in self.outcomes if o.status == "skipped"]


def require_lead(user, detector):
    if selectors.role_in(user, detector.team) != Membership.Role.LEAD:
        raise PermissionDenied(
            f"{user} may not re-score {detector}: only leads of {detector.team} can"
        )


def rescore(detector, user, split, versions=None):
    """Re-score ``versions`` (ids; default every version) of ``detector`` on ``split``
    (a ``BenchmarkSplit``, one revision) in one transaction; returns a ``Result``.

    Versions are locked in id order (the lock uploads and judging take), and each
    one's set on ``split`` is re-read under it, so a concurrent upload or re-score of
    the same version is either seen or waits. A version whose stored file is missing
    from the storage is skipped (named); a file whose bytes changed fails its
    evaluation with the hash mismatch when scored (audited), like any stored file.
    """
    from .judging_queue import judge_if_complete, rejudge_later
    from .services import request_for_set

    require_lead(user, detector)
    all_ids = list(detector.versions.order_by("pk").values_list("pk", flat=True))
    if versions is None:
        wanted = all_ids
    else:
        wanted = sorted({int(v) for v in versions})
        foreign = [v for v in wanted if v not in set(all_ids)]
        if foreign:
            raise UploadError(
                f"versions: {', '.join(map(str, foreign))} not versions of {detector}",
                path="versions",
            )
        if not wanted:
            raise UploadError("versions: choose at least one version", path="versions")
    result = Result(split)
    decided = False
    with transaction.atomic():
        locked = ModelVersion.objects.select_for_update().filter(pk__in=wanted).order_by("pk")
        for version in locked:
            outcome = _rescore_one(version, split, user)
            result.outcomes.append(outcome)
            if outcome.status != "rescored":
                continue
            request_for_set(outcome.prediction_set)
            if SignOff.objects.filter(version=version).exists():
                decided = True  # a baseline's new numbers: its candidates judge again
            else:
                judge_if_complete(version.pk)
        if decided:
            rejudge_later(detector.pk)
    return result


def _source(version, split):
    """The version's current set on the newest earlier revision of ``split``'s name."""
    return (
        PredictionSet.objects.current()
        .filter(version=version, split__name=split.name, split__revision__lt=split.revision)
        .select_related("split", "predictions", "uploaded_by")
        .order_by("-split__revision")
        .first()
    )


def _rescore_one(version, split, user):
    here = PredictionSet.objects.current().filter(version=version, split=split).first()
    if here is not None:
        what = "already re-scored on" if here.rescored else "already has its own predictions on"
        return Outcome(version, "skipped", f"{what} {split}", here)
    source = _source(version, split)
    if source is None:
        return Outcome(version, "skipped", f"no predictions on an earlier revision of {split.name}")
    stored = source.predictions.file
    if not stored.name or not stored.storage.exists(stored.name):
        return Outcome(
            version,
            "skipped",
            f"the stored file of its predictions on {source.split} ({source.file_name}) is "
            "missing from the storage",
            source=source,
        )
    now = timezone.now()
    new = PredictionSet.objects.create(
        version=version,
        split=split,
        predictions=source.predictions,
        uploaded_by=source.uploaded_by,
        file_name=source.file_name,
        rescored_from=source,
        rescored_by=user,
        rescored_at=now,
    )
    # uploaded_at is auto_now_add: the original upload's time is written afterwards
    PredictionSet.objects.filter(pk=new.pk).update(uploaded_at=source.uploaded_at)
    new.uploaded_at = source.uploaded_at
    audit.record_event(
        AuditEvent.Kind.PREDICTIONS_RESCORED,
        user,
        f"prediction-set:{new.pk}",
        {
            "version": str(version),
            "split": str(split),
            "from": {"prediction_set": source.pk, "split": str(source.split)},
            "sha256": source.predictions.sha256,
            "file": source.file_name,
            "uploaded_by": source.uploaded_by.get_username(),
            "uploaded_at": source.uploaded_at.isoformat(),
            "unknown_images": new.unknown_images,
        },
    )
    return Outcome(version, "rescored", prediction_set=new, source=source)


def as_dict(result):
    """The result as the API and the command give it."""
    return {
        "split": {
            "id": result.split.pk,
            "name": result.split.name,
            "revision": result.split.revision,
        },
        "rescored": len(result.rescored),
        "skipped": len(result.skipped),
        "versions": [
            {
                "version": o.version.pk,
                "label": o.version.label,
                "status": o.status,
                "reason": o.reason,
                "prediction_set": getattr(o.prediction_set, "pk", None),
                "from_split": str(o.source.split) if o.source else None,
            }
            for o in result.outcomes
        ],
    }
