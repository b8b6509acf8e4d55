"""Receivers of the evaluation app's signals, connected in ReleasesConfig.ready()."""

from . import audit
from .audit_check import result_digests
from .models import AuditEvent


def split_frozen(sender, split, **kwargs):
    _rejudge_followers(split)
    audit.record_event(
        AuditEvent.Kind.SPLIT_FROZEN,
        split.created_by or "system",
        f"split:{split.pk}",
        {
            "split": str(split),
            "sha256": split.sha256,
            "images": split.image_count,
            "boxes": split.box_count,
        },
    )


def evaluation_finished(sender, evaluation, **kwargs):
    card = evaluation.scorecard
    audit.record_event(
        AuditEvent.Kind.EVALUATION_FINISHED,
        "system",
        f"evaluation:{evaluation.pk}",
        {
            "protocol": evaluation.protocol,
            "split_sha256": card.split_sha256,
            "predictions_sha256": card.predictions_sha256,
            "engine_version": card.engine_version,
            "summary": card.summary,
            "result": result_digests(evaluation.pk),  # re-derived by verify_audit
        },
    )


def evaluation_failed(sender, evaluation, **kwargs):
    audit.record_event(
        AuditEvent.Kind.EVALUATION_FAILED,
        "system",
        f"evaluation:{evaluation.pk}",
        {
            "protocol": evaluation.protocol,
            "error": evaluation.error,
            "result": result_digests(evaluation.pk),
        },
    )


def content_mismatch(sender, subject, error, **kwargs):
    """A stored file (split, predictions, records) no longer matches its recorded hash."""
    audit.record_event(
        AuditEvent.Kind.CONTENT_MISMATCH,
        "system",
        subject,
        {"message": str(error), **error.as_dict()},
    )


def judge_when_complete(sender, evaluation, **kwargs):
    """Once every evaluation of a version has finished, judge it (on commit)."""
    from .models import PredictionSet
    from .services import judge_if_complete

    versions = (
        PredictionSet.objects.current()
        .filter(predictions_id=evaluation.predictions_id, split_id=evaluation.split_id)
        .values_list("version_id", flat=True)
    )
    for version_id in set(versions):
        judge_if_complete(version_id)


def _rejudge_followers(split):
    """A new revision of a split that suites follow (revision null) changes what their
    candidates must be scored on: judge them again."""
    from .models import BenchmarkSuite
    from .services import rejudge_later

    newest = {}
    for suite in BenchmarkSuite.objects.order_by("detector_id", "-number"):
        newest.setdefault(suite.detector_id, suite)
    for detector_id, suite in newest.items():
        if any(e["name"] == split.name and e["revision"] is None for e in suite.splits):
            rejudge_later(detector_id)
