"""Re-derive what the audit chain vouches for from the rows, and check its head.

The chain alone proves that events were not edited; these checks prove that the rows
the events describe were not edited either, and that the chain itself was not cut short
or rewritten:

* every finished evaluation's event carries ``result``, digests of its stored rows
  (``result_digests``), recomputed here from the rows as they are now;
* every finished evaluation, judgement and release decision has its event;
* the split named by a split-frozen event still exists with the content hash it had;
* a release decision still reads as its event recorded it, and so does a judgement
  (verdict, reasons, the evaluations it saw, its outcomes counted by status and the
  digest of every outcome's values; judgements chained before that digest are checked
  without it);
* the head file (``id hash`` lines written after each event) names only events that
  exist, with those hashes: a deleted tail or a chain recomputed from some event on
  is caught there even though the remaining chain is consistent.
"""

import hashlib
from dataclasses import dataclass, field

from evaluation import levels
from evaluation.models import BenchmarkSplit, ClassScore, Evaluation, Scorecard, SliceScore

from .audit import digest, verify_audit
from .models import AuditEvent, Judgement, Outcome, SignOff

RESULT_FORMAT = 1
PARTS = (
    "format",
    "evaluation",
    "scorecard",
    "classes",
    "slices",
    "slice_metrics",
    "slice_miss_rate",
    "records",
    "unknown_images",
    "unknown_classes",
)
DECISION_KINDS = (AuditEvent.Kind.SIGNED_OFF, AuditEvent.Kind.REJECTED, AuditEvent.Kind.OVERRIDE)
FINISH_KINDS = (AuditEvent.Kind.EVALUATION_FINISHED, AuditEvent.Kind.EVALUATION_FAILED)
DECISION_FIELDS = ("decision", "comment", "override", "justification", "evidence")
CLASS_COLUMNS = (
    "class_name",
    "ap",
    "ap50",
    "ap75",
    "recall",
    "gt",
    "tp",
    "fp",
    "best_f1",
    "best_f1_threshold",
    "miss_rate",
)
SLICE_COLUMNS = ("kind", "name", "class_name", "ap", "images")
#: A part of its own, so events recorded before these columns existed still verify.
SLICE_METRIC_COLUMNS = ("kind", "name", "class_name", "ap50", "ap75", "recall", "all_metrics")
#: The miss-rate setups' level rows, a part of their own: rows of scorecards finished
#: before the column existed were added later (migration 0015) and must not change the
#: ``slices`` digest their events recorded (which held no rows of those scorecards).
SLICE_MISS_RATE_COLUMNS = ("kind", "name", "class_name", "miss_rate")
OUTCOME_COLUMNS = (
    "version_id",
    "criteria_id",
    "rule_index",
    "rule",
    "split_id",
    "class_name",
    "status",
    "value",
    "baseline_value",
    "baseline_id",
    "low",
    "high",
    "detail",
)


def _file_sha256(field_file):
    if not field_file:
        return None
    try:
        with field_file.storage.open(field_file.name, "rb") as f:
            h = hashlib.sha256()
            for block in iter(lambda: f.read(1 << 20), b""):
                h.update(block)
            return h.hexdigest()
    except OSError:
        return "missing"


def result_digests(evaluation_id):
    """Digests (SHA-256 of canonical JSON) of a finished evaluation's stored rows.

    ``evaluation``: its inputs, state, error and finish time; ``scorecard``: the stored
    numbers and hashes (summary and the full result); ``classes`` and ``slices``: the
    per-class and slice rows, sorted (``slice_metrics``: the slices' AP50, AP75, recall,
    and ``slice_miss_rate``: the miss-rate setups' rows, each checked only on events
    that recorded it); ``records``: SHA-256 of the match-records file;
    ``unknown_images``: the evaluation's policy for predictions on images the split does
    not have (reject, or drop and count), and ``unknown_classes`` its policy for
    detections of classes the split does not list: parts of their own so events
    recorded before them still verify. A part that does not exist digests ``null``.
    """
    e = Evaluation.objects.filter(pk=evaluation_id).first()
    if e is None:
        return {"format": RESULT_FORMAT, "evaluation": "missing"}
    parts = {
        "format": RESULT_FORMAT,
        "evaluation": digest(
            {
                "id": e.pk,
                "split": e.split_id,
                "predictions": e.predictions_id,
                "protocol": e.protocol,
                "box_policy": e.box_policy,
                "state": e.state,
                "engine_version": e.engine_version,
                "error": e.error,
                "error_detail": e.error_detail,
                "finished_at": e.finished_at.isoformat() if e.finished_at else None,
            }
        ),
        "unknown_images": digest(e.unknown_images),
        "unknown_classes": digest(e.unknown_classes),
    }
    card = Scorecard.objects.filter(evaluation_id=evaluation_id).first()
    parts["scorecard"] = digest(
        card
        and {
            "protocol": card.protocol,
            "protocol_version": card.protocol_version,
            "engine_version": card.engine_version,
            "split_sha256": card.split_sha256,
            "predictions_sha256": card.predictions_sha256,
            "summary": card.summary,
            "result": card.result,
        }
    )
    classes = ClassScore.objects.filter(scorecard__evaluation_id=evaluation_id)
    every_slice = SliceScore.objects.filter(scorecard__evaluation_id=evaluation_id)
    miss_rate_protocols = [n for n, p in levels.LEVEL_PROTOCOLS.items() if p.metric == "miss_rate"]
    setups = every_slice.filter(scorecard__protocol__in=miss_rate_protocols)
    slices = every_slice.exclude(scorecard__protocol__in=miss_rate_protocols)
    parts["classes"] = digest(sorted(classes.values_list(*CLASS_COLUMNS), key=lambda r: r[0]))
    parts["slices"] = digest(sorted(slices.values_list(*SLICE_COLUMNS), key=lambda r: r[:3]))
    parts["slice_metrics"] = digest(
        sorted(slices.values_list(*SLICE_METRIC_COLUMNS), key=lambda r: r[:3])
    )
    parts["slice_miss_rate"] = digest(
        sorted(setups.values_list(*SLICE_MISS_RATE_COLUMNS), key=lambda r: r[:3])
    )
    parts["records"] = _file_sha256(card.records) if card else None
    return parts


def judgement_payload(judgement):
    """The fields of a judgement that its audit event records: verdict, reasons, the
    evaluations seen (the candidate's and, ``baseline_evaluations``, the baseline's: a
    re-scored baseline is judged against), its outcomes counted by status, and
    ``outcome_values``, the digest of every outcome row (rule, split, class, status,
    value, baseline value, interval, detail), so an edited value or bound is reported,
    not only a changed status. Events recorded before a field existed are checked on
    the fields they carry."""
    rows = list(Outcome.objects.filter(judgement=judgement).values_list(*OUTCOME_COLUMNS))
    counts = {}
    for row in rows:
        status = row[OUTCOME_COLUMNS.index("status")]
        counts[status] = counts.get(status, 0) + 1
    return {
        "verdict": judgement.verdict,
        "reasons": judgement.reasons,
        "evaluations": judgement.evaluations,
        "baseline_evaluations": judgement.baseline_evaluations,
        "outcomes": counts,
        "outcome_values": digest(sorted(rows, key=lambda row: digest(list(row)))),
    }


def decision_payload(sign_off):
    """The fields of a decision that its audit event records."""
    return {name: getattr(sign_off, name) for name in DECISION_FIELDS}


@dataclass
class Report:
    """What ``check`` found. ``problems`` are findings of tampering (or of an event
    never written); ``notes`` are facts worth showing that prove nothing wrong."""

    count: int = 0
    head: str = ""
    broken: int | None = None
    problems: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    results_checked: int = 0
    judgements_checked: int = 0
    decisions_checked: int = 0

    @property
    def ok(self):
        return self.broken is None and not self.problems


def _subject_id(subject, prefix):
    kind, _, pk = subject.partition(":")
    return int(pk) if kind == prefix and pk.isdigit() else None


def check(head_lines=None):
    """The whole check: chain, rows against their events, and (if given) the head
    file's lines. Returns a ``Report``."""
    report = Report()
    report.broken, report.head, report.count = verify_audit()
    _check_rows(report)
    if head_lines is not None:
        _check_head(report, head_lines)
    return report


def _check_rows(report):
    finished = set(
        Evaluation.objects.filter(state__in=["done", "failed"]).values_list("pk", flat=True)
    )
    chained, legacy, legacy_judgements = set(), 0, 0
    decided, judged = {}, {}
    fields = ("pk", "kind", "subject", "payload")
    for pk, kind, subject, payload in AuditEvent.objects.order_by("id").values_list(*fields):
        if kind in FINISH_KINDS:
            evaluation_id = _subject_id(subject, "evaluation")
            chained.add(evaluation_id)
            recorded = payload.get("result")
            if recorded is None:
                legacy += 1
                continue
            report.results_checked += 1
            now = result_digests(evaluation_id)
            changed = [p for p in PARTS if p in recorded and now.get(p) != recorded[p]]
            if now.get("evaluation") == "missing":
                report.problems.append(f"event #{pk}: evaluation {evaluation_id} no longer exists")
            elif changed:
                report.problems.append(
                    f"event #{pk}: the stored result of evaluation {evaluation_id} no longer "
                    f"matches its digest ({', '.join(changed)})"
                )
        elif kind == AuditEvent.Kind.SPLIT_FROZEN:
            split_id = _subject_id(subject, "split")
            split = BenchmarkSplit.objects.filter(pk=split_id).first()
            if split is None or split.sha256 != payload.get("sha256"):
                what = "no longer exists" if split is None else "has another content hash"
                report.problems.append(f"event #{pk}: split {split_id} {what}")
        elif kind in DECISION_KINDS:
            decided[_subject_id(subject, "version")] = (pk, payload)
        elif kind == AuditEvent.Kind.JUDGED:
            judged[payload.get("judgement")] = (pk, payload)
    for evaluation_id in sorted(finished - chained):
        report.problems.append(f"evaluation {evaluation_id} is finished but not in the chain")
    for sign_off in SignOff.objects.order_by("pk"):
        pk, payload = decided.pop(sign_off.version_id, (None, None))
        if pk is None:
            report.problems.append(
                f"the decision on version {sign_off.version_id} is not in the chain"
            )
            continue
        report.decisions_checked += 1
        now = decision_payload(sign_off)
        changed = [k for k in now if k in payload and digest(payload[k]) != digest(now[k])]
        if changed:
            report.problems.append(
                f"event #{pk}: the decision on version {sign_off.version_id} no longer reads "
                f"as recorded ({', '.join(changed)})"
            )
    for version_id, (pk, _) in sorted(decided.items()):
        report.problems.append(f"event #{pk}: the decision on version {version_id} is gone")
    for judgement in Judgement.objects.order_by("pk"):
        pk, payload = judged.pop(judgement.pk, (None, None))
        if pk is None:
            report.problems.append(f"judgement {judgement.pk} is not in the chain")
            continue
        report.judgements_checked += 1
        legacy_judgements += "outcome_values" not in payload
        now = judgement_payload(judgement)
        changed = [k for k in now if k in payload and digest(payload[k]) != digest(now[k])]
        if changed:
            report.problems.append(
                f"event #{pk}: judgement {judgement.pk} no longer reads as recorded "
                f"({', '.join(changed)})"
            )
    for judgement_id, (pk, _) in sorted(judged.items(), key=lambda item: item[1][0]):
        report.problems.append(f"event #{pk}: judgement {judgement_id} is gone")
    if legacy:
        report.notes.append(
            f"{legacy} evaluation event(s) from before result digests: results not re-derived"
        )
    if legacy_judgements:
        report.notes.append(
            f"{legacy_judgements} judgement event(s) from before outcome digests: outcome "
            "values not compared (statuses counted only)"
        )


def read_head_file(path):
    """The head file's lines; OSError if it cannot be read."""
    with open(path, encoding="utf-8") as f:
        return f.readlines()


def verify_and_record(checked_by, head_file=None):
    """Run the full ``check`` (with ``head_file``'s lines when given: by default the
    configured ``BENCHBOOK_AUDIT_HEAD_FILE``) and keep its outcome as an
    ``AuditVerification`` — what the audit page shows. A head file that cannot be read
    is a finding. Returns ``(report, verification)``."""
    import time

    from django.conf import settings
    from django.utils import timezone

    from .models import AuditVerification

    head_file = head_file or getattr(settings, "BENCHBOOK_AUDIT_HEAD_FILE", None) or ""
    started = time.monotonic()
    lines, unreadable = None, None
    if head_file:
        try:
            lines = read_head_file(head_file)
        except OSError as e:
            unreadable = f"cannot read the head file {head_file}: {e.strerror}"
    report = check(lines)
    if unreadable:
        report.problems.append(unreadable)
    verification = AuditVerification.objects.create(
        checked_at=timezone.now(),
        checked_by=checked_by,
        seconds=round(time.monotonic() - started, 3),
        ok=report.ok,
        events=report.count,
        head=report.head,
        broken=report.broken,
        results=report.results_checked,
        judgements=report.judgements_checked,
        decisions=report.decisions_checked,
        head_file=head_file if lines is not None else "",
        problems=report.problems,
        notes=report.notes,
    )
    return report, verification


def verify_now(user):
    """The audit page's button: reviewers (who read every team, as the findings name
    any team's rows) run the full verification; anyone else is refused."""
    from django.core.exceptions import PermissionDenied

    from .selectors import reads_all_teams

    if not reads_all_teams(user):
        raise PermissionDenied("only reviewers can run the full verification")
    return verify_and_record(user.get_username())


def _check_head(report, lines):
    hashes = dict(AuditEvent.objects.values_list("pk", "hash"))
    newest = 0
    for number, line in enumerate(lines, 1):
        if not line.strip():
            continue
        event_id, _, event_hash = line.strip().partition(" ")
        if not event_id.isdigit() or len(event_hash) != 64:
            report.problems.append(f"head file line {number}: not 'id hash': {line.strip()!r}")
            continue
        event_id = int(event_id)
        newest = max(newest, event_id)
        if event_id not in hashes:
            report.problems.append(
                f"head file line {number}: event #{event_id} is missing from the database "
                "(deleted or truncated)"
            )
        elif hashes[event_id] != event_hash:
            report.problems.append(
                f"head file line {number}: event #{event_id} has another hash in the "
                "database (the chain was rewritten)"
            )
    behind = [pk for pk in hashes if pk > newest]
    if behind:
        report.notes.append(
            f"{len(behind)} event(s) after the head file's last line (#{newest}): "
            "not vouched for by it"
        )
