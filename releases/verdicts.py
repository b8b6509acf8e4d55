"""THE verdict of a candidate: the one reading of its judgement inputs and state.

States: ``scoring`` (an evaluation of a current prediction set, under a suite protocol,
is queued, running or not yet requested) → ``judging`` (all finished; no judgement
recorded against the current criteria, suite, baseline and evaluations) → one final
state, from that judgement: ``incomplete`` (a required split has no scored predictions,
an evaluation failed, or judging itself failed on every retry), ``regression`` (a rule fails) or
``pass``. ``no_criteria`` says the detector had no criteria when judged.

A decided version keeps the verdict its decision was made on. Pages, API, client,
evidence and sign-off all read ``verdict_of``; ``judging.judge`` is the only writer of
judgements, and it takes the version's row lock, as ``services.sign_off`` does.
"""

from dataclasses import dataclass, field

from django.db.models import F, Q, Window
from django.db.models.functions import RowNumber

from . import suites
from .models import Judgement, ModelVersion, PredictionSet, SignOff

STATES = ("scoring", "judging", "incomplete", "regression", "pass")
FINAL = ("incomplete", "regression", "pass")
OPEN = ("queued", "running")


@dataclass
class Verdict:
    state: str
    no_criteria: bool = False
    reasons: list = field(default_factory=list)
    judgement: Judgement | None = None
    evaluations: list = field(default_factory=list)
    missing: list = field(default_factory=list)
    decided: bool = False

    @property
    def final(self):
        return self.state in FINAL


def current_sets(version):
    """The version's current prediction sets (one per split), with their splits."""
    sets = PredictionSet.objects.current().filter(version=version)
    return list(sets.select_related("split", "predictions"))


def baseline_for(version):
    """The detector's baseline for judging ``version``: its most recently approved
    version other than ``version`` itself, or None."""
    return (
        ModelVersion.objects.filter(detector_id=version.detector_id, sign_off__decision="approved")
        .exclude(pk=version.pk)
        .order_by("-sign_off__decided_at", "-sign_off__id")
        .first()
    )


@dataclass
class Inputs:
    """Everything a judgement depends on; ``key`` compares two readings."""

    criteria: object
    suite: object
    baseline: object
    sets: list
    evaluations: list
    required: list
    unrequested: list  # (prediction set, protocol) with no evaluation yet
    # The baseline's evaluations under the suite's protocols: a re-scored baseline (a
    # new revision) changes what a candidate is compared with, so it is judged again.
    baseline_evaluations: list = field(default_factory=list)
    # Why the rules cannot be judged apart from the mean (``reserved_reasons``).
    reserved: list = field(default_factory=list)

    @property
    def key(self):
        return (
            getattr(self.criteria, "pk", None),
            getattr(self.suite, "pk", None),
            getattr(self.baseline, "pk", None),
            evaluation_states(self.evaluations),
            [s.pk for s in self.required],
            evaluation_states(self.baseline_evaluations),
        )

    @property
    def scoring(self):
        return bool(self.unrequested) or any(e.state in OPEN for e in self.evaluations)

    def missing(self):
        scored = {e.split_id for e in self.evaluations}
        have = {ps.split_id for ps in self.sets}
        return [s for s in self.required if s.pk not in have or s.pk not in scored]


def evaluation_states(evaluations):
    return {str(e.pk): e.state for e in sorted(evaluations, key=lambda e: e.pk)}


def _newest_per(model, field, ids, order):
    """Rows of ``model`` that are the newest (by ``order``) for each ``field`` in ids,
    in one query."""
    from django.db.models import OuterRef, Subquery

    newest = model.objects.filter(**{field: OuterRef(field)}).order_by(order).values("pk")[:1]
    return model.objects.filter(**{f"{field}__in": ids}, pk=Subquery(newest))


def inputs_for(versions):
    """{version id: Inputs} of many versions (any detectors) in at most seven queries,
    whatever their number: the one reading of a judgement's inputs (``inputs_of`` is this for one
    version), so badges, lists, the sweep and the judge cannot disagree."""
    from evaluation.models import BenchmarkSplit, Evaluation

    from .models import BenchmarkSuite, Detector, ReleaseCriteria

    versions = list(versions)
    if not versions:
        return {}
    detector_ids = {v.detector_id for v in versions}
    detectors = Detector.objects.in_bulk(detector_ids)
    suites_ = _newest_per(BenchmarkSuite, "detector_id", detector_ids, "-number")
    suite_of = {s.detector_id: s for s in suites_}
    criteria_of = {
        c.detector_id: c
        for c in _newest_per(ReleaseCriteria, "detector_id", detector_ids, "-number")
    }
    approved = {}
    newest_first = [F("sign_off__decided_at").desc(), F("sign_off__id").desc()]
    # The two approved last per detector: a version's baseline is the newest other than
    # itself (every approved version of a detector would grow with its history).
    ranked = ModelVersion.objects.filter(
        detector_id__in=detector_ids, sign_off__decision="approved"
    ).annotate(rank=Window(RowNumber(), partition_by=F("detector_id"), order_by=newest_first))
    for v in ranked.filter(rank__lte=2).order_by(*newest_first):
        approved.setdefault(v.detector_id, []).append(v)
    baseline_of = {
        v.pk: next((b for b in approved.get(v.detector_id, []) if b.pk != v.pk), None)
        for v in versions
    }
    sets_of = {}
    wanted = {v.pk for v in versions} | {b.pk for b in baseline_of.values() if b is not None}
    for ps in (
        PredictionSet.objects.current().filter(version_id__in=wanted).select_related("predictions")
    ):
        sets_of.setdefault(ps.version_id, []).append(ps)
    protocols_of = {
        d: (suite_of[d].protocols if d in suite_of else [detectors[d].primary_protocol])
        for d in detector_ids
    }
    # Each set's own evaluations (the ones it asked for), never another team's or
    # another image policy's evaluation of the same bytes.
    all_sets = [ps for sets in sets_of.values() for ps in sets]
    # One Evaluation per link (its set's id annotated), no link objects built.
    linked = (
        Evaluation.objects.filter(
            prediction_sets__in=[ps.pk for ps in all_sets],
            protocol__in={p for ps in protocols_of.values() for p in ps},
        ).annotate(linked_set=F("prediction_sets"))
        if all_sets
        else []
    )
    names = {e["name"] for s in suite_of.values() for e in s.splits}
    # Each split and file row is built once and shared by the sets and evaluations that
    # name it (splits are frozen): at 1,000 versions x 5 splits, select_related built
    # 20,000 split and file objects and decoded each split's JSON fields 10,000 times.
    split_ids = {ps.split_id for ps in all_sets}
    splits_by_id = BenchmarkSplit.objects.filter(Q(pk__in=split_ids) | Q(name__in=names))
    splits_by_id = {split.pk: split for split in splits_by_id} if split_ids or names else {}
    files = {ps.predictions_id: ps.predictions for ps in all_sets}
    for ps in all_sets:
        ps.split = splits_by_id[ps.split_id]
    by_set = {}
    for e in linked:
        e.split, e.predictions = splits_by_id[e.split_id], files[e.predictions_id]
        by_set.setdefault(e.linked_set, []).append(e)
    split_rows = {}
    for split in splits_by_id.values():
        if split.name in names:
            split_rows.setdefault(split.name, {})[split.revision] = split

    def evaluations_of(version_id, suite, protocols):
        found = [
            e
            for ps in sets_of.get(version_id, [])
            for e in by_set.get(ps.pk, [])
            if e.protocol in protocols
            and (
                suite is None
                or (e.box_policy, e.unknown_classes) == (suite.box_policy, suite.unknown_classes)
            )
        ]
        return sorted(
            found, key=lambda e: (e.split.name, e.split.revision, protocols.index(e.protocol), e.pk)
        )

    out = {}
    for version in versions:
        detector_id = version.detector_id
        suite = suite_of.get(detector_id)
        protocols = protocols_of[detector_id]
        sets = sets_of.get(version.pk, [])
        evaluations = evaluations_of(version.pk, suite, protocols)
        have = {(e.predictions_id, e.split_id, e.protocol) for e in evaluations}
        unrequested = [
            (ps, p)
            for ps in sets
            for p in protocols
            if (ps.predictions_id, ps.split_id, p) not in have
        ]
        baseline = baseline_of[version.pk]
        out[version.pk] = Inputs(
            criteria=criteria_of.get(detector_id),
            suite=suite,
            baseline=baseline,
            sets=sets,
            evaluations=evaluations,
            required=suites.resolve_from(suite.splits, split_rows) if suite else [],
            unrequested=unrequested,
            baseline_evaluations=(
                evaluations_of(baseline.pk, suite, protocols) if baseline is not None else []
            ),
            reserved=reserved_reasons(detectors[detector_id], criteria_of.get(detector_id)),
        )
    return out


def reserved_reasons(detector, criteria):
    """A class named as a rule word (``detectors.RESERVED``, refused since; older
    detectors may have one): a ``*`` or ``mean`` rule would read the split's mean for it,
    so the candidate cannot be judged (*incomplete*) until the class is renamed
    (``detectors.set_classes``). Read with the inputs (``Inputs.reserved``), so a pass
    judged before such names were refused reads *incomplete* too (``_undecided``)."""
    from .detectors import reserved

    names = [c for c in detector.classes if reserved(c)]
    rules = getattr(criteria, "rules", None) or []
    if not names or not any(reserved(r.get("class", "mean")) for r in rules):
        return []
    return [
        f"class {name!r} of {detector} is named as a rule word ('mean', '*'): its rules "
        "cannot be judged apart from the mean; rename the class"
        for name in names
    ]


def inputs_of(version):
    return inputs_for([version])[version.pk]


def newest_judgements(version_ids):
    """{version id: its newest Judgement}, in one query."""
    rows = _newest_per(Judgement, "version_id", set(version_ids), "-id")
    return {j.version_id: j for j in rows}


def newest_judgement(version):
    return Judgement.objects.filter(version=version).order_by("-id").first()


def _matches(judgement, inputs):
    return (
        judgement is not None
        and (
            judgement.criteria_id,
            judgement.suite_id,
            judgement.baseline_id,
            judgement.evaluations,
            judgement.required_splits,
            judgement.baseline_evaluations,
        )
        == inputs.key
    )


def _pending_reasons(inputs):
    reasons = [] if inputs.sets else ["no predictions uploaded"]
    reasons += [f"no predictions on {s}" for s in inputs.missing()]
    failed = [e for e in inputs.evaluations if e.state == "failed"]
    reasons += [f"{e.protocol} on {e.split} failed: {e.error}" for e in failed]
    return reasons


def verdict_of(version):
    """The candidate's verdict (see the module docstring)."""
    return verdicts_of([version])[version.pk]


def verdicts_of(versions):
    """{version id: Verdict} of many versions in at most nine queries, whatever their
    number:
    THE verdict; every page, list, badge, API field and the sign-off read it here."""
    versions = list(versions)
    if not versions:
        return {}
    ids = [v.pk for v in versions]
    rows = SignOff.objects.filter(version_id__in=ids).select_related("judgement")
    decisions = {d.version_id: d for d in rows}
    all_inputs = inputs_for(versions)
    newest = newest_judgements([pk for pk in ids if pk not in decisions])
    return {
        v.pk: _decided(all_inputs[v.pk], decisions[v.pk])
        if v.pk in decisions
        else _undecided(all_inputs[v.pk], newest.get(v.pk))
        for v in versions
    }


def _undecided(inputs, judgement):
    missing = [str(s) for s in inputs.missing()]
    if inputs.scoring:
        return Verdict("scoring", evaluations=inputs.evaluations, missing=missing)
    if not inputs.sets:  # nothing to judge: incomplete without a judgement
        return Verdict(
            "incomplete",
            no_criteria=inputs.criteria is None,
            reasons=_pending_reasons(inputs),
            missing=missing,
        )
    if not _matches(judgement, inputs):
        return Verdict(
            "judging",
            no_criteria=inputs.criteria is None,
            reasons=_pending_reasons(inputs),
            judgement=None,
            evaluations=inputs.evaluations,
            missing=missing,
        )
    if judgement.verdict == "pass" and inputs.reserved:  # judged before the names were refused
        return Verdict(
            "incomplete",
            no_criteria=judgement.criteria_id is None,
            reasons=list(inputs.reserved),
            judgement=judgement,
            evaluations=inputs.evaluations,
            missing=missing,
        )
    return Verdict(
        judgement.verdict,
        no_criteria=judgement.criteria_id is None,
        reasons=list(judgement.reasons),
        judgement=judgement,
        evaluations=inputs.evaluations,
        missing=missing,
    )


def _decided(inputs, decision):
    """A decided version keeps what the decision saw (older decisions: their rules)."""
    judgement = decision.judgement
    if judgement is not None:
        state, reasons = judgement.verdict, list(judgement.reasons)
        no_criteria = judgement.criteria_id is None
    else:  # decided before judgements were recorded
        reasons = [f.get("detail") or str(f.get("rule")) for f in decision.failing_rules]
        state = "regression" if decision.failing_rules else "pass"
        no_criteria = False
    return Verdict(
        state,
        no_criteria=no_criteria,
        reasons=reasons,
        judgement=judgement,
        evaluations=inputs.evaluations,
        missing=[str(s) for s in inputs.missing()],
        decided=True,
    )
