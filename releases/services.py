"""Business logic of releases: who may do what, versions, prediction uploads, sign-off.

Queuing judging lives in ``judging_queue``; the judge itself in ``judging``."""

from django.core.exceptions import PermissionDenied
from django.db import IntegrityError, transaction
from django.utils import timezone
from django.utils.text import slugify

from evaluation import services as evaluation_services
from evaluation.protocols import not_primary
from evaluation.protocols import resolve as resolve_protocol
from evaluation.services import UploadConflict, UploadError

from . import audit, history_stamps, selectors
from .judging_queue import judge_if_complete, rejudge_later
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


def create_detector(
    team, name, classes, *, protocols=("coco",), description="", splits=(), suite=None, user=None
):
    """A detector and its first benchmark suite, exactly one audited version: ``suite``
    (validated by ``suites.validate_suite``) or one from ``protocols`` and ``splits``
    (names, newest revision)."""
    from . import suites
    from .detectors import validate_classes

    classes = validate_classes(classes)  # every way of creating one passes here
    if suite is not None:  # checked by validate_suite (its custom protocols stored below)
        protocols = suite["protocols"]
    else:
        for protocol in protocols:
            resolve_protocol(protocol)
        if not_primary(protocols[0]):
            raise UploadError(not_primary(protocols[0]), path="protocols[0]")
    with transaction.atomic():
        detector = Detector.objects.create(
            team=team,
            name=name,
            slug=slugify(name),
            classes=list(classes),
            primary_protocol=protocols[0],
            protocols=list(protocols),
            description=description,
        )
        suites.first_suite(detector, user, protocols=protocols, splits=splits, clean=suite)
    return detector


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


def _policies(detector):
    """The box and class policies the in-request check applies: the suite's, as its
    evaluations will (``received_predictions`` keywords)."""
    from . import suites

    suite = suites.current_suite(detector)
    if suite is None:
        return {"boxes": "keep", "unknown_classes": None}
    return {"boxes": suite.box_policy, "unknown_classes": suite.unknown_classes}


def submit_predictions(version, split, uploaded, user):
    """Store a version's predictions on a split and queue their evaluations.

    The identical file again returns the same prediction set. A different file for a
    version and split that already have one replaces it only if that set's
    evaluations all finished and at least one failed (``_replace_or_refuse``).
    """
    require_upload_right(user, version.detector)
    policies = _policies(version.detector)
    with evaluation_services.received_predictions(uploaded, split, **policies) as received:
        with transaction.atomic():
            return _record_set(version, split, received, user)


def submit_for_label(detector, label, split, uploaded, user, **version_fields):
    """``submit_predictions`` for a version named by label, created if new; a refused
    upload leaves no new version behind."""
    require_upload_right(user, detector)
    policies = _policies(detector)
    with evaluation_services.received_predictions(uploaded, split, **policies) as received:
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
    request_for_set(prediction_set)
    # Bytes scored before (another version's identical file) trigger no new
    # evaluation, so nothing else would judge this version.
    judge_if_complete(version.pk)
    return prediction_set


def _replace_or_refuse(version, split, current):
    """Retire ``current`` (the split's set) so a new upload can take its place, or
    raise ``UploadConflict`` saying why it stays. Only a set whose evaluations all
    finished, at least one failed, of an undecided version may go; it is kept as
    history. Returns the failed evaluations ([{protocol, error}]) for the audit trail."""
    from .models import SignOff

    if current is None:
        return []
    evaluations = list(current.evaluations.order_by("protocol"))
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


def evaluation_scope(team_id):
    """The ``Evaluation.scope`` of a team's evaluations."""
    return f"team:{team_id}"


def request_for_set(prediction_set, protocols=None):
    """Request the set's evaluations under its detector's suite (``protocols``: a
    subset, e.g. one a suite change added) and link them to the set: a set's
    evaluations are the ones it asked for, never those another upload of the same bytes
    asked for. Their scope is the team (``evaluation_scope``): another team's identical
    bytes get evaluations of their own, so no time, attempt or message is shared."""
    from . import suites

    suite = suites.current_suite(prediction_set.version.detector)
    evaluations = evaluation_services.request_evaluations(
        prediction_set.split,
        prediction_set.predictions,
        suite.protocols if protocols is None else protocols,
        box_policy=suite.box_policy,
        unknown_classes=suite.unknown_classes,
        scope=evaluation_scope(prediction_set.version.detector.team_id),
        file_name=prediction_set.file_name,
        unknown_images=prediction_set.unknown_images,
    )
    prediction_set.evaluations.add(*evaluations)
    history_stamps.changed([prediction_set.version.detector_id])
    return evaluations


class DecisionError(ValueError):
    """A sign-off the rules do not allow; the message says why."""


def _headline(evaluation):
    """The number a sign-off keeps of an evaluation: ``AP`` (None when not scored or
    when the protocol has none), and for a level protocol its headline level and, for
    the miss-rate setups, ``miss_rate`` (lower is better; red team audit16 F5)."""
    summary = evaluation.scorecard.summary if evaluation.state == "done" else {}
    kept = {"AP": summary.get("AP")}
    for key in ("miss_rate", "level"):
        if key in summary:
            kept[key] = summary[key]
    return kept


def _decided_on(evaluation):
    """What a sign-off's evidence keeps of how an evaluation's numbers were computed
    (``selectors.stored_provenance``); an evaluation without a result keeps its id
    and requested box policy, and says it has no record."""
    if evaluation.state == "done":
        return selectors.stored_provenance(evaluation.scorecard)
    return {
        "evaluation": evaluation.pk,
        "box_policy": evaluation.box_policy,
        "protocol_record": None,
        "not_recorded": {
            "protocol_record": f"no stored result: the evaluation is {evaluation.state}"
        },
    }


def sign_off(version, user, decision, comment, *, justification=""):
    """Record a lead's decision on a candidate; approval makes it the baseline.

    THE sign-off: every entry point (page, API, demo) calls it. Decided inside one
    transaction holding the version's row lock, the same lock ``judging.judge`` takes
    to record a judgement, on the verdict read under that lock: only a final verdict
    (incomplete, regression, pass) can be decided; approving anything but ``pass`` is
    an *override* and needs a written justification; rejecting needs a comment.
    """
    from . import verdicts
    from .models import Outcome, SignOff

    detector = version.detector
    if selectors.role_in(user, detector.team) != Membership.Role.LEAD:
        raise PermissionDenied(
            f"{user} may not sign off {version}: only leads of {detector.team} can"
        )
    if decision not in SignOff.Decision.values:
        raise DecisionError(f"decision must be one of {', '.join(SignOff.Decision.values)}")
    if not comment.strip():
        raise DecisionError("a sign-off needs a comment")
    approve = decision == SignOff.Decision.APPROVED
    with transaction.atomic():
        ModelVersion.objects.select_for_update().get(pk=version.pk)
        if SignOff.objects.filter(version_id=version.pk).exists():
            raise DecisionError(f"{version} already has a decision")
        verdict = verdicts.verdict_of(version)
        if not verdict.final:
            raise DecisionError(
                f"{version} is {verdict.state}: a decision waits for the final verdict"
                + (" (evaluations queued or running)" if verdict.state == "scoring" else "")
            )
        override = approve and verdict.state != "pass"
        if override and not justification.strip():
            why = "; ".join(verdict.reasons[:3]) or "see the outcomes"
            raise DecisionError(
                f"{version} is {verdict.state} ({why}): "
                "approving it is an override and needs a written justification"
            )
        judgement = verdict.judgement  # None only when nothing was uploaded
        failing = [
            {
                "rule": o.rule_index + 1,
                "split": str(o.split),
                "class": o.class_name,
                "status": o.status,
                "detail": o.detail,
            }
            for o in Outcome.objects.filter(
                judgement=judgement, judgement__isnull=False, status__in=["fail", "missing"]
            ).select_related("split")
        ]
        evidence = {
            "verdict": verdict.state,
            "reasons": verdict.reasons,
            "no_criteria": verdict.no_criteria,
            "judgement": getattr(judgement, "pk", None),
            "criteria": getattr(getattr(judgement, "criteria", None), "number", None),
            "suite": getattr(getattr(judgement, "suite", None), "number", None),
            "baseline": getattr(getattr(judgement, "baseline", None), "label", None),
            "evaluations": [
                {
                    "split": str(e.split),
                    "split_sha256": e.split.sha256,
                    "protocol": e.protocol,
                    "state": e.state,
                    "engine_version": e.engine_version,
                    **_headline(e),
                    # how that number was computed, as its stored result says (the
                    # protocol record, box policy, ...): kept with the decision
                    **_decided_on(e),
                }
                for e in verdict.evaluations
            ],
            "failing_rules": failing,
        }
        kind = (
            AuditEvent.Kind.OVERRIDE
            if override
            else AuditEvent.Kind.SIGNED_OFF
            if approve
            else AuditEvent.Kind.REJECTED
        )
        try:
            with transaction.atomic():
                record = SignOff.objects.create(
                    version=version,
                    decision=decision,
                    comment=comment.strip(),
                    override=override,
                    justification=justification.strip() if approve else "",
                    failing_rules=failing,
                    evidence=evidence,
                    judgement=judgement,
                    verdict=verdict.state,
                    decided_by=user,
                    decided_at=timezone.now(),
                )
        except IntegrityError:
            raise DecisionError(f"{version} already has a decision") from None
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
        if approve:  # a new baseline: the other candidates are judged against it
            rejudge_later(detector.pk)
    return record, event
