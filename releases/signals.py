"""Receivers of the evaluation app's signals, connected in ReleasesConfig.ready()."""

from . import audit, history_stamps
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


def result_recorded(sender, evaluation, **kwargs):
    """The evaluation-finished or -failed event, with the digests of the rows just
    written, in the same transaction as the result: a crash leaves both or neither."""
    if evaluation.state == evaluation.State.DONE:
        card = evaluation.scorecard
        kind = AuditEvent.Kind.EVALUATION_FINISHED
        payload = {
            "protocol": evaluation.protocol,
            "split_sha256": card.split_sha256,
            "predictions_sha256": card.predictions_sha256,
            "engine_version": card.engine_version,
            "summary": card.summary,
        }
    else:
        kind = AuditEvent.Kind.EVALUATION_FAILED
        payload = {"protocol": evaluation.protocol, "error": evaluation.error}
    payload["result"] = result_digests(evaluation.pk)  # re-derived by verify_audit
    audit.record_event(kind, "system", f"evaluation:{evaluation.pk}", payload)
    history_stamps.changed_by_evaluation(evaluation.pk)


def content_mismatch(sender, subject, error, **kwargs):
    """A stored file (split, predictions, records) no longer matches its recorded hash."""
    audit.record_event(
        AuditEvent.Kind.CONTENT_MISMATCH,
        "system",
        subject,
        {"message": str(error), **error.as_dict()},
    )


def judge_when_complete(sender, evaluation, **kwargs):
    """Once every evaluation of a version has finished, judge it (on commit). A decided
    version is never judged again, but its new evaluations (a baseline re-scored on a
    new revision) change what the detector's candidates are compared with: they are
    judged again."""
    from .judging_queue import judge_if_complete, rejudge_later
    from .models import PredictionSet

    rows = (
        PredictionSet.objects.current()
        .filter(evaluations=evaluation.pk)
        .values_list("version_id", "version__detector_id", "version__sign_off")
    )
    for version_id, detector_id, decision in set(rows):
        if decision is None:
            judge_if_complete(version_id)
        else:
            rejudge_later(detector_id)


def _rejudge_followers(split):
    """A new revision of a split that suites follow (revision null) changes what their
    candidates must be scored on: judge them again."""
    from .judging_queue import rejudge_later
    from .models import BenchmarkSuite

    newest = {}
    for suite in BenchmarkSuite.objects.order_by("detector_id", "-number"):
        newest.setdefault(suite.detector_id, suite)
    for detector_id, suite in newest.items():
        if any(e["name"] == split.name and e["revision"] is None for e in suite.splits):
            rejudge_later(detector_id)
