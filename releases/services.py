"""Business logic of releases: who may do what, versions, prediction uploads."""

import logging

from django.core.exceptions import PermissionDenied
from django.db import IntegrityError, transaction
from django.utils import timezone
from django.utils.text import slugify

from evaluation import services as evaluation_services
from evaluation.services import UploadConflict, UploadError

from . import audit, selectors
from .models import AuditEvent, Detector, Membership, ModelVersion, PredictionSet, Team
from .selectors import UPLOAD_ROLES

log = logging.getLogger(__name__)


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

    The identical file again returns the same prediction set. A different file for a
    version and split that already have one replaces it only if that set's
    evaluations all finished and at least one failed (``_replace_or_refuse``).
    """
    require_upload_right(user, version.detector)
    with evaluation_services.received_predictions(uploaded, split) as received:
        with transaction.atomic():
            return _record_set(version, split, received, user)


def submit_for_label(detector, label, split, uploaded, user, **version_fields):
    """``submit_predictions`` for a version named by label, created if new; a refused
    upload leaves no new version behind."""
    require_upload_right(user, detector)
    with evaluation_services.received_predictions(uploaded, split) as received:
        with transaction.atomic():
            version = ModelVersion.objects.filter(detector=detector, label=label.strip()).first()
            if version is None:
                version = create_version(detector, label, user, **version_fields)
            return _record_set(version, split, received, user)


def _record_set(version, split, received, user):
    """The one place a prediction set is created (inside the caller's transaction):
    uploads of a version are serialised on its row, the current set of the split is
    re-read under that lock, and the database allows one current set per version and
    split (``one_current_set_per_split``)."""
    ModelVersion.objects.select_for_update().filter(pk=version.pk).exists()
    current = (
        PredictionSet.objects.current()
        .select_related("predictions")
        .filter(version=version, split=split)
        .first()
    )
    if current is not None and current.predictions.sha256 == received.sha256:
        return current
    failed = _replace_or_refuse(version, split, current)
    prediction_file = received.store()
    prediction_set = PredictionSet.objects.create(
        version=version,
        split=split,
        predictions=prediction_file,
        uploaded_by=user,
        file_name=received.name,
    )
    payload = {
        "version": str(version),
        "split": str(split),
        "sha256": prediction_file.sha256,
        "size": prediction_file.size,
        "file": prediction_set.file_name,
    }
    if current is None:
        kind = AuditEvent.Kind.PREDICTIONS_UPLOADED
    else:
        kind = AuditEvent.Kind.PREDICTIONS_REPLACED
        PredictionSet.objects.filter(pk=current.pk).update(replaced_by=prediction_set)
        payload["replaces"] = {
            "prediction_set": current.pk,
            "sha256": current.predictions.sha256,
            "file": current.file_name,
            "failed": failed,
        }
    audit.record_event(kind, user, f"prediction-set:{prediction_set.pk}", payload)
    evaluation_services.request_evaluations(split, prediction_file, version.detector.protocols)
    # Bytes scored before (another version's identical file) trigger no new
    # evaluation, so nothing else would judge this version.
    judge_if_complete(version.pk)
    return prediction_set


def _replace_or_refuse(version, split, current):
    """Retire ``current`` (the split's set) so a new upload can take its place, or
    raise ``UploadConflict`` saying why it stays. Only a set whose evaluations all
    finished, at least one failed, of an undecided version may go; it is kept as
    history. Returns the failed evaluations ([{protocol, error}]) for the audit trail."""
    from evaluation.models import Evaluation

    from .models import SignOff

    if current is None:
        return []
    evaluations = list(
        Evaluation.objects.filter(
            predictions_id=current.predictions_id, split_id=current.split_id
        ).order_by("protocol")
    )
    states = sorted({e.state for e in evaluations})
    where = f"{version} already has predictions on {split} ({current.file_name})"
    if SignOff.objects.filter(version=version).exists():
        raise UploadConflict(
            f"{where} and a decision was recorded on them; upload new predictions as a new version"
        )
    if "failed" not in states or {"queued", "running"} & set(states):
        raise UploadConflict(
            f"{where} whose evaluations are {', '.join(states) or 'not requested'}; only "
            "predictions whose evaluations failed can be replaced: upload these as a new version"
        )
    PredictionSet.objects.filter(pk=current.pk).update(replaced_at=timezone.now())
    return [{"protocol": e.protocol, "error": e.error} for e in evaluations if e.state == "failed"]


def judge_if_complete(version_id):
    """Queue judging (on commit) once none of the version's evaluations is pending."""
    from evaluation.models import Evaluation

    from .tasks import judge

    sets = PredictionSet.objects.current().filter(version_id=version_id)
    pending = (
        Evaluation.objects.filter(
            predictions_id__in=sets.values("predictions_id"), split_id__in=sets.values("split_id")
        )
        .exclude(state__in=["done", "failed"])
        .exists()
    )
    if not pending:
        transaction.on_commit(lambda: _send(judge, version_id))


def requeue_unjudged():
    """Queue judging again for versions whose evaluations all finished more than the
    grace period ago but that were not judged since (the broker was down when judging
    was to be queued, or the judging worker died). Returns the version ids."""
    import datetime

    from django.conf import settings
    from django.db.models import Exists, F, OuterRef, Q, Subquery

    from evaluation.models import Evaluation

    from .tasks import judge

    same_input = {"predictions_id": OuterRef("predictions_id"), "split_id": OuterRef("split_id")}
    cutoff = timezone.now() - datetime.timedelta(seconds=settings.BENCHBOOK_QUEUED_GRACE_SECONDS)
    last_finished = Evaluation.objects.filter(**same_input).order_by("-finished_at")
    sets = PredictionSet.objects.current().annotate(
        last=Subquery(last_finished.values("finished_at")[:1]),
        open=Exists(Evaluation.objects.filter(**same_input, state__in=["queued", "running"])),
    )
    stale = sets.filter(open=False, last__lt=cutoff).filter(
        Q(version__judged_at__isnull=True) | Q(version__judged_at__lt=F("last"))
    )
    busy = sets.filter(open=True)  # a version with any evaluation still to come waits
    version_ids = sorted(
        set(stale.values_list("version_id", flat=True))
        - set(busy.values_list("version_id", flat=True))
    )
    for version_id in version_ids:
        _send(judge, version_id)
    return version_ids


def _send(task, *args):
    try:
        task.delay(*args)
    except Exception:  # broker down: judging can be re-run, it is idempotent
        log.exception("could not queue %s%s", task.name, args)


class DecisionError(ValueError):
    """A sign-off the rules do not allow; the message says why."""


def failing_rules(version):
    """The outcomes the version fails under its detector's current criteria."""
    from .models import Outcome

    return [
        {"rule": o.rule_index + 1, "split": str(o.split), "class": o.class_name, "detail": o.detail}
        for o in Outcome.objects.filter(version=version, status=Outcome.Status.FAIL).select_related(
            "split"
        )
    ]


def sign_off(version, user, decision, comment, *, justification=""):
    """Record a lead's decision on a candidate; approval makes it the baseline."""
    from evaluation.models import Evaluation

    from .models import SignOff

    detector = version.detector
    if selectors.role_in(user, detector.team) != Membership.Role.LEAD:
        raise PermissionDenied(
            f"{user} may not sign off {version}: only leads of {detector.team} can"
        )
    if decision not in SignOff.Decision.values:
        raise DecisionError(f"decision must be one of {', '.join(SignOff.Decision.values)}")
    if not comment.strip():
        raise DecisionError("a sign-off needs a comment")
    sets = list(version.prediction_sets.current())
    if not sets:
        raise DecisionError(f"{version} has no predictions on any split yet")
    evaluations = list(
        Evaluation.objects.filter(
            predictions_id__in=[ps.predictions_id for ps in sets],
            split_id__in=[ps.split_id for ps in sets],
        ).select_related("scorecard", "split")
    )
    pending = [e for e in evaluations if not e.finished]
    if pending:
        raise DecisionError(f"{version} still has {len(pending)} evaluation(s) queued or running")
    failing = failing_rules(version)
    override = decision == SignOff.Decision.APPROVED and bool(failing)
    if override and not justification.strip():
        raise DecisionError(
            f"approving {version} despite {len(failing)} failing rule(s) "
            "is an override and needs a written justification"
        )
    evidence = {
        "evaluations": [
            {
                "split": str(e.split),
                "split_sha256": e.split.sha256,
                "protocol": e.protocol,
                "state": e.state,
                "engine_version": e.engine_version,
                "AP": e.scorecard.summary.get("AP") if e.state == "done" else None,
            }
            for e in evaluations
        ],
        "failing_rules": failing,
    }
    kind = (
        AuditEvent.Kind.OVERRIDE
        if override
        else AuditEvent.Kind.SIGNED_OFF
        if decision == SignOff.Decision.APPROVED
        else AuditEvent.Kind.REJECTED
    )
    try:
        with transaction.atomic():
            record = SignOff.objects.create(
                version=version,
                decision=decision,
                comment=comment.strip(),
                override=override,
                justification=justification.strip(),
                failing_rules=failing,
                evidence=evidence,
                decided_by=user,
                decided_at=timezone.now(),
            )
            event = audit.record_event(
                kind,
                user,
                f"version:{version.pk}",
                {
                    "version": str(version),
                    "decision": decision,
                    "comment": record.comment,
                    "override": override,
                    "justification": record.justification,
                    "evidence": evidence,
                },
            )
    except IntegrityError:
        raise DecisionError(f"{version} already has a decision") from None
    return record, event
