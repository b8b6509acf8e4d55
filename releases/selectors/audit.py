"""The audit trail page: the events a reader may see, filtered, each linked to its subject."""

import difflib
import json

from django.db.models import CharField, Exists, OuterRef, Q, Value
from django.db.models.functions import Cast, Concat

from ..models import ModelVersion, PredictionSet
from .access import visible_audit_events, visible_detectors

PAGE_SIZE = 100
SPEC_PAGES = {"criteria changed": "criteria", "suite changed": "suite"}  # kind -> page


def subject_keys(queryset, prefix):
    """A subquery of ``prefix<pk>`` strings, as ``AuditEvent.subject`` names a row."""
    return queryset.annotate(
        subject_key=Concat(Value(prefix), Cast("pk", CharField()), output_field=CharField())
    ).values("subject_key")


def _about_sets(sets):
    """Events about these prediction sets and about the evaluations they asked for."""
    from evaluation.models import Evaluation

    links = PredictionSet.evaluations.through.objects.filter(predictionset__in=sets)
    evaluations = Evaluation.objects.filter(Exists(links.filter(evaluation_id=OuterRef("pk"))))
    return Q(subject__in=subject_keys(sets, "prediction-set:")) | Q(
        subject__in=subject_keys(evaluations, "evaluation:")
    )


def audit_trail(
    user, *, detector=None, version=None, kind="", actor="", since=None, until=None, before=None
):
    """Newest first, ``PAGE_SIZE`` at a time (``before``: the id to continue below).

    ``version`` narrows to its own events, its uploads and their evaluations;
    ``detector`` to those of all its versions plus the detector's (criteria, suite,
    webhook). Returns ``{"events": [{"event", "link"}], "next": id or None}``.
    """
    events = visible_audit_events(user)
    if version is not None:
        sets = PredictionSet.objects.filter(version=version)
        events = events.filter(Q(subject=f"version:{version.pk}") | _about_sets(sets))
    elif detector is not None:
        versions = ModelVersion.objects.filter(detector=detector)
        sets = PredictionSet.objects.filter(version__detector=detector)
        events = events.filter(
            Q(subject=f"detector:{detector.pk}")
            | Q(subject__in=subject_keys(versions, "version:"))
            | _about_sets(sets)
        )
    if kind:
        events = events.filter(kind=kind)
    if actor:
        events = events.filter(actor=actor)
    if since is not None:
        events = events.filter(created_at__gte=since)
    if until is not None:
        events = events.filter(created_at__lt=until)
    if before is not None:
        events = events.filter(pk__lt=before)
    rows = list(events.order_by("-id")[: PAGE_SIZE + 1])
    more = len(rows) > PAGE_SIZE
    rows = rows[:PAGE_SIZE]
    links = subject_links(user, rows)
    return {
        "events": [{"event": e, "link": links.get((e.kind, e.subject))} for e in rows],
        "next": rows[-1].pk if more else None,
    }


def last_verification(user):
    """The newest full verification (``audit_check.verify_and_record``) for the audit
    page: ``{"verification", "details", "can_run", "head_file"}``. Findings name any
    team's rows, so only reviewers see them (``details``) and may run a new one."""
    from django.conf import settings

    from ..models import AuditVerification
    from .access import reads_all_teams

    reviewer = user.is_authenticated and reads_all_teams(user)
    return {
        "verification": AuditVerification.objects.order_by("-checked_at", "-pk").first(),
        "details": reviewer,
        "can_run": reviewer,
        "head_file": getattr(settings, "BENCHBOOK_AUDIT_HEAD_FILE", None) or "",
    }


def _ids(events, prefix):
    out = set()
    for e in events:
        if e.subject.startswith(prefix):
            tail = e.subject[len(prefix) :]
            if tail.isdigit():
                out.add(int(tail))
    return out


def subject_links(user, events):
    """{(kind, subject): {"page", "id", "label"}}: the page that shows each subject
    (a URL name and its argument), for subjects the user may see. Five queries."""
    from evaluation.models import BenchmarkSplit, Evaluation

    detectors = visible_detectors(user)
    links = {}
    names = {d.pk: d for d in detectors.filter(pk__in=_ids(events, "detector:"))}
    versions = {
        v.pk: v
        for v in ModelVersion.objects.filter(
            pk__in=_ids(events, "version:"), detector__in=detectors
        ).select_related("detector")
    }
    sets = {
        s.pk: s
        for s in PredictionSet.objects.filter(
            pk__in=_ids(events, "prediction-set:"), version__detector__in=detectors
        ).select_related("version__detector", "split")
    }
    splits = {s.pk: s for s in BenchmarkSplit.objects.filter(pk__in=_ids(events, "split:"))}
    evaluations = {
        e.pk: e
        for e in Evaluation.objects.filter(pk__in=_ids(events, "evaluation:")).select_related(
            "split"
        )
    }
    owners = {}
    for link in PredictionSet.evaluations.through.objects.filter(
        evaluation_id__in=list(evaluations), predictionset__version__detector__in=detectors
    ).select_related("predictionset__version__detector"):
        owners.setdefault(link.evaluation_id, link.predictionset.version)
    for e in events:
        prefix, _, tail = e.subject.partition(":")
        pk = int(tail) if tail.isdigit() else None
        link = None
        if prefix == "detector" and pk in names:
            page = {"criteria changed": "criteria", "suite changed": "suite"}.get(
                e.kind, "detector"
            )
            link = {"page": page, "id": pk, "label": names[pk].name}
        elif prefix == "version" and pk in versions:
            v = versions[pk]
            link = {"page": "version", "id": pk, "label": f"{v.detector} {v.label}"}
        elif prefix == "prediction-set" and pk in sets:
            ps = sets[pk]
            link = {"page": "version", "id": ps.version_id, "label": str(ps)}
        elif prefix == "split" and pk in splits:
            link = {"page": "split", "id": pk, "label": str(splits[pk])}
        elif prefix == "evaluation" and pk in evaluations:
            ev = evaluations[pk]
            owner = owners.get(ev.pk)
            if owner is not None:
                link = {
                    "page": "version",
                    "id": owner.pk,
                    "label": f"{owner.detector} {owner.label} on {ev.split} ({ev.protocol})",
                }
        if link is not None:
            links[(e.kind, e.subject)] = link
    return links


def spec_history(rows, spec_of):
    """Each version of a versioned spec (criteria, suite), newest first, with the
    lines added and removed since the version before (a unified diff of its JSON)."""
    rows = sorted(rows, key=lambda r: r.number)
    out, previous = [], None
    for row in rows:
        text = json.dumps(spec_of(row), indent=2, sort_keys=True)
        diff = []
        if previous is not None:
            for line in difflib.unified_diff(
                previous.splitlines(), text.splitlines(), lineterm="", n=1
            ):
                if line.startswith(("---", "+++")):
                    continue
                kind = {"+": "added", "-": "removed", "@": "hunk"}.get(line[:1], "same")
                diff.append((kind, line))
        out.append({"row": row, "text": text, "diff": diff, "first": previous is None})
        previous = text
    return list(reversed(out))


def detector_choices(user):
    """Visible detectors with their versions, for the filter form (two queries)."""
    detectors = list(visible_detectors(user).order_by("team__name", "name"))
    versions = {}
    for v in ModelVersion.objects.filter(detector__in=detectors).order_by("created_at"):
        versions.setdefault(v.detector_id, []).append(v)
    return [(d, versions.get(d.pk, [])) for d in detectors]
