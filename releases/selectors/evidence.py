"""The evidence report a reviewer keeps."""

from ..class_thresholds import row_of
from .access import CAUTION
from .decisions import outcomes_of, verdict_summary
from .scores import class_numbers, summary_items
from .version import shown_suite, version_scorecards


def evidence_for(version):
    """Everything a reviewer needs about one version, JSON-serialisable: per split
    the primary scorecard's numbers with the evaluation, hashes and how they were
    computed (``provenance.stored_provenance``: the stored protocol record, box
    policy, engine version, ground-truth fingerprint), and the other protocols'
    numbers with theirs."""
    from django.conf import settings as django_settings

    from evaluation.engine import ENGINE_VERSION

    from ..audit import verify_audit
    from ..models import AuditEvent
    from ..verdicts import verdict_of

    detector = version.detector
    verdict = verdict_of(version)
    outcomes = outcomes_of(version, verdict.judgement)
    suite = shown_suite(version, verdict)
    intervals = {
        (o.split_id, o.class_name): (o.low, o.high)
        for o in outcomes
        if o.rule.get("kind") == "no_significant_drop"
        and o.low is not None
        # the whole split's ΔAP only: not a tag's, a size bucket's or a level's interval
        and not any(o.rule.get(k) for k in ("tag", "size", "level"))
    }
    splits = []
    for entry in version_scorecards(version, suite):
        card = entry["card"]
        if card is None:
            splits.append({"split": str(entry["split"]), "scored": False})
            continue
        classes = []
        for row in entry["classes"]:
            if row is None:
                continue
            # the outcome names the detector's class, the row the split's: in any case
            on_split = {c: v for (s, c), v in intervals.items() if s == entry["split"].pk}
            low, high = on_split.get(row_of(on_split, row.class_name), (None, None))
            classes.append({**class_numbers(row), "delta_AP_interval": [low, high]})
        splits.append(
            {
                "split": str(entry["split"]),
                "scored": True,
                "protocol": card.protocol,
                "protocol_version": card.protocol_version,
                "engine_version": card.engine_version,
                "split_sha256": card.split_sha256,
                "predictions_sha256": card.predictions_sha256,
                # how the numbers were computed, as the stored result says: the
                # protocol record (box policy included), fingerprint, ...
                **entry["provenance"],
                "summary": dict(summary_items(card.summary)),
                "classes": classes,
                "absent_classes": dict(entry["absent"]),
                "deployed": _deployed(entry["deployed"]),
                # the other protocols' headline AP and level tables, each with its own
                "other_protocols": {p: ap for p, ap in entry["others"]},
                "levels": entry["levels"],
                "other_protocols_provenance": entry["other_provenance"],
            }
        )
    decision = getattr(version, "sign_off", None)
    broken, head, count = verify_audit()
    events = AuditEvent.objects.filter(subject=f"version:{version.pk}").order_by("id")
    return {
        "caution": CAUTION,
        "detector": detector.name,
        "team": detector.team.name,
        "version": version.label,
        "source_commit": version.source_commit,
        "registered": version.created_at.isoformat(),
        "engine_version": ENGINE_VERSION,
        "bootstrap": {
            "resamples": django_settings.BENCHBOOK_BOOTSTRAP_RESAMPLES,
            "seed": django_settings.BENCHBOOK_BOOTSTRAP_SEED,
        },
        "splits": splits,
        "verdict": verdict_summary(verdict),
        "outcomes": [
            {
                "rule": o.rule_index + 1,
                "criteria_version": o.criteria.number,
                "kind": o.rule.get("kind"),
                "level": o.rule.get("level"),
                "tag": o.rule.get("tag"),
                "split": str(o.split),
                "class": o.class_name,
                "status": o.status,
                "value": o.value,
                "baseline": o.baseline.label if o.baseline else None,
                "baseline_value": o.baseline_value,
                "interval": [o.low, o.high],
                "detail": o.detail,
            }
            for o in outcomes
        ],
        "sign_off": None
        if decision is None
        else {
            "decision": decision.decision,
            "by": decision.decided_by.get_username(),
            "at": decision.decided_at.isoformat(),
            "comment": decision.comment,
            "override": decision.override,
            "justification": decision.justification,
            "failing_rules": decision.failing_rules,
        },
        "audit": {
            "chain_intact": broken is None,
            "first_broken_event": broken,
            "head": head,
            "events": count,
            "decision_events": [e.hash for e in events],
        },
    }


def _deployed(numbers):
    """The report keeps the engine's shape: suite version, per class and pooled."""
    if numbers is None:
        return None
    return {k: numbers[k] for k in ("suite_version", "per_class", "pooled")}
