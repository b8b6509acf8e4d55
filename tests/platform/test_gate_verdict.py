"""The release gate (issue 10): one verdict state machine, judgements kept forever, and
sign-off only on a final verdict, approving anything but ``pass`` as an override.

The rules checked here are the issue's own: scoring → judging → incomplete |
regression | pass; a required split without scored predictions is an explicit failing
outcome; a criteria change, a suite change or a new baseline re-judges undecided
candidates; every judgement is an audit event and the chain stays intact.
"""

import pytest

from evaluation import services as evaluation_services
from releases import criteria, judging, judging_queue, rule_outcomes, services, suites, verdicts
from releases import tasks as release_tasks
from releases.audit import verify_audit
from releases.models import AuditEvent, Judgement, Outcome, SignOff

from .conftest import detections_for, split_dict, upload

pytestmark = pytest.mark.django_db

# A perfect AP is out of reach of the synthetic detections (they miss and mislocate
# some boxes on purpose, tests/engine/synthetic.py): this rule always fails.
IMPOSSIBLE = {"kind": "min_value", "metric": "AP", "class": "mean", "split": "*", "threshold": 1.0}
EASY = {"kind": "min_value", "metric": "AP", "class": "mean", "split": "*", "threshold": 0.0}


@pytest.fixture
def day_truth():
    return split_dict(seed=9)


@pytest.fixture
def day(day_truth):
    return evaluation_services.load_split(
        name="bay-day", revision=1, truth=upload("bay-day.json", day_truth)
    )


def _submit(run_tasks, version, split, truth, users, seed=6, name="p.json"):
    return run_tasks(
        services.submit_predictions,
        version,
        split,
        upload(name, detections_for(truth, seed=seed)),
        users["engineer"],
    )


def _no_refusal_stored(before_events):
    assert SignOff.objects.count() == 0
    assert AuditEvent.objects.count() == before_events


# The state machine -----------------------------------------------------------------


def test_states_in_order_scoring_judging_then_final(
    version, split, split_truth, users, monkeypatch, run_tasks
):
    """Queued evaluations: scoring; all finished but not judged: judging; then pass."""

    monkeypatch.setattr(
        "evaluation.services.queueing.dispatch", lambda pk: None
    )  # nothing scores yet
    services.submit_predictions(
        version, split, upload("p.json", detections_for(split_truth)), users["engineer"]
    )
    assert verdicts.verdict_of(version).state == "scoring"
    monkeypatch.undo()
    from evaluation.models import Evaluation

    for evaluation in Evaluation.objects.all():
        evaluation_services.run_evaluation(evaluation.pk)
    verdict = verdicts.verdict_of(version)
    assert (verdict.state, verdict.judgement) == ("judging", None)
    judgement = run_tasks(judging.judge, version.pk)
    verdict = verdicts.verdict_of(version)
    assert (verdict.state, verdict.no_criteria, verdict.judgement) == ("pass", True, judgement)


def test_sign_off_while_judging_is_refused(
    version, split, split_truth, users, run_tasks, monkeypatch
):
    """Every evaluation finished, judging not recorded yet (the ~1 s window of the
    issue): approval and rejection are refused, nothing is stored."""
    criteria.set_criteria(version.detector, users["lead"], [IMPOSSIBLE])
    monkeypatch.setattr(release_tasks.judge, "delay", lambda *args: None)  # judge is late
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    assert verdicts.verdict_of(version).state == "judging"
    before = AuditEvent.objects.count()
    for decision in ("approved", "rejected"):
        with pytest.raises(services.DecisionError, match="is judging: a decision waits"):
            services.sign_off(version, users["lead"], decision, "now", justification="x")
    _no_refusal_stored(before)
    # Once judged, the failing rule makes approval an override.
    judging.judge(version.pk)
    assert verdicts.verdict_of(version).state == "regression"
    with pytest.raises(services.DecisionError, match="is regression .*needs a written just"):
        services.sign_off(version, users["lead"], "approved", "ship")


def test_a_failed_evaluation_is_incomplete_and_approval_is_an_override(
    version, split, split_truth, users, run_tasks, settings
):
    """All evaluations failed (bad boxes, in a file too large to check inside the
    request): incomplete, naming the error; approving is an override with a
    justification, rejecting needs only a comment."""
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0  # the worker finds the error
    bad = detections_for(split_truth)
    bad[2]["bbox"] = bad[2]["bbox"][:3]
    run_tasks(
        services.submit_predictions, version, split, upload("bad.json", bad), users["engineer"]
    )
    verdict = verdicts.verdict_of(version)
    assert verdict.state == "incomplete"
    assert any("failed: bad.json: record 2: field 'bbox'" in r for r in verdict.reasons)
    with pytest.raises(
        services.DecisionError, match="is incomplete .*needs a written justification"
    ):
        services.sign_off(version, users["lead"], "approved", "fine")
    assert SignOff.objects.count() == 0
    record, event = services.sign_off(
        version, users["lead"], "approved", "fine", justification="scored offline, see ticket"
    )
    assert (record.override, record.verdict, event.kind) == (True, "incomplete", "override")
    assert record.judgement == verdict.judgement


def test_rejecting_an_incomplete_candidate_needs_only_a_comment(
    version, split, split_truth, users, run_tasks, settings
):
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0  # the worker finds the error
    bad = detections_for(split_truth)
    bad[0]["score"] = "high"
    run_tasks(
        services.submit_predictions, version, split, upload("bad.json", bad), users["engineer"]
    )
    record, event = services.sign_off(version, users["lead"], "rejected", "broken export")
    assert (record.decision, record.override, event.kind) == ("rejected", False, "rejected")


def test_a_missing_required_split_is_an_explicit_failing_outcome(
    detector, version, split, day, split_truth, users, run_tasks
):
    """Suite: bay-night and bay-day. Uploaded on bay-night only: incomplete, and every
    rule over '*' has a *missing* outcome on bay-day rev 1, not a silent skip."""
    suites.set_suite(detector, users["lead"], {"splits": ["bay-night", "bay-day"]})
    criteria.set_criteria(detector, users["lead"], [EASY])
    _submit(run_tasks, version, split, split_truth, users)
    verdict = verdicts.verdict_of(version)
    assert verdict.state == "incomplete"
    assert verdict.reasons == ["no predictions on bay-day rev 1"]
    assert verdict.missing == ["bay-day rev 1"]
    outcomes = {(o.split.name, o.status) for o in verdict.judgement.outcomes.all()}
    assert outcomes == {("bay-night", "pass"), ("bay-day", "missing")}
    with pytest.raises(services.DecisionError, match="no predictions on bay-day rev 1.*override"):
        services.sign_off(version, users["lead"], "approved", "night only")
    record, _ = services.sign_off(
        version, users["lead"], "approved", "night only", justification="day route closed"
    )
    assert record.override and record.failing_rules[0]["status"] == "missing"


def test_a_new_revision_of_a_followed_split_is_required(
    detector, version, split, split_truth, users, run_tasks
):
    """The suite follows bay-night's newest revision: loading rev 2 makes a candidate
    scored on rev 1 incomplete ('no predictions on bay-night rev 2'), re-judged."""
    suites.set_suite(detector, users["lead"], {"splits": [{"name": "bay-night", "revision": None}]})
    _submit(run_tasks, version, split, split_truth, users)
    assert verdicts.verdict_of(version).state == "pass"
    run_tasks(
        evaluation_services.load_split,
        name="bay-night",
        revision=2,
        truth=upload("bay-night-2.json", split_dict(seed=11)),
    )
    verdict = verdicts.verdict_of(version)
    assert (verdict.state, verdict.reasons) == ("incomplete", ["no predictions on bay-night rev 2"])


def test_judging_that_raises_is_recorded_not_stuck(
    version, split, split_truth, users, run_tasks, monkeypatch
):
    """An exception on the last judging attempt becomes an incomplete judgement naming
    it (the retries before it: test_gate_judging_retries.py)."""
    criteria.set_criteria(version.detector, users["lead"], [EASY])

    def broken(*args):
        raise OSError("match records missing from storage")

    monkeypatch.setattr(rule_outcomes, "outcomes_for", broken)
    monkeypatch.setattr(release_tasks.judge, "max_retries", 0)  # this is the last attempt
    _submit(run_tasks, version, split, split_truth, users)
    verdict = verdicts.verdict_of(version)
    assert verdict.state == "incomplete"
    assert verdict.reasons == ["judging failed once: OSError: match records missing from storage"]


def test_the_judge_never_uses_the_version_itself_as_baseline(
    detector, version, split, split_truth, users, run_tasks
):
    _submit(run_tasks, version, split, split_truth, users)
    run_tasks(services.sign_off, version, users["lead"], "approved", "first")
    assert verdicts.baseline_for(version) is None
    assert judging.judge(version.pk) is None  # decided: judged no more
    assert Judgement.objects.filter(version=version).count() == 1


# Judgements and re-judging ---------------------------------------------------------


def test_a_criteria_change_rejudges_undecided_candidates_only(
    detector, split, split_truth, users, run_tasks
):
    """Criteria v1 passes both; v2 fails: the undecided one gets a new judgement (the old
    one and its outcomes kept), the decided one keeps its verdict; all audited."""
    run_tasks(criteria.set_criteria, detector, users["lead"], [EASY])
    decided = services.create_version(detector, "1.0", users["engineer"])
    _submit(run_tasks, decided, split, split_truth, users, name="a.json")
    run_tasks(services.sign_off, decided, users["lead"], "approved", "baseline")
    candidate = services.create_version(detector, "1.1", users["engineer"])
    _submit(run_tasks, candidate, split, split_truth, users, seed=7, name="b.json")
    first = verdicts.verdict_of(candidate).judgement
    assert first.verdict == "pass" and first.baseline == decided

    run_tasks(criteria.set_criteria, detector, users["lead"], [IMPOSSIBLE])
    verdict = verdicts.verdict_of(candidate)
    assert verdict.state == "regression" and verdict.judgement.criteria.number == 2
    assert Judgement.objects.filter(version=candidate).count() == 2
    assert Outcome.objects.filter(judgement=first, status="pass").count() == 1  # kept
    assert verdicts.verdict_of(decided).state == "pass"  # what the decision saw
    assert Judgement.objects.filter(version=decided).count() == 1
    judged = AuditEvent.objects.filter(kind="judged", subject=f"version:{candidate.pk}")
    assert [e.payload["verdict"] for e in judged.order_by("id")] == ["pass", "regression"]
    assert verify_audit()[0] is None


def test_a_new_baseline_rejudges_candidates(detector, split, split_truth, users, run_tasks):
    """B was judged with no baseline; approving A re-judges B against A."""
    a = services.create_version(detector, "1.0", users["engineer"])
    _submit(run_tasks, a, split, split_truth, users, name="a.json")
    b = services.create_version(detector, "1.1", users["engineer"])
    _submit(run_tasks, b, split, split_truth, users, seed=7, name="b.json")
    assert verdicts.verdict_of(b).judgement.baseline is None
    run_tasks(services.sign_off, a, users["lead"], "approved", "baseline")
    judgement = verdicts.verdict_of(b).judgement
    assert judgement is not None and judgement.baseline == a
    assert verify_audit()[0] is None


def test_a_stale_judgement_reads_judging_until_rejudged(
    detector, version, split, split_truth, users, run_tasks
):
    """Criteria changed and the re-judging not run yet: judging, and sign-off refused."""
    _submit(run_tasks, version, split, split_truth, users)
    assert verdicts.verdict_of(version).state == "pass"
    criteria.set_criteria(detector, users["lead"], [IMPOSSIBLE])  # re-judging not run
    assert verdicts.verdict_of(version).state == "judging"
    with pytest.raises(services.DecisionError, match="is judging"):
        services.sign_off(version, users["lead"], "approved", "it passed before")


def test_judgements_and_outcomes_are_insert_only_in_code(
    version, split, split_truth, users, run_tasks
):
    _submit(run_tasks, version, split, split_truth, users)
    judgement = Judgement.objects.get(version=version)
    with pytest.raises(ValueError, match="kept as recorded"):
        judgement.save()
    with pytest.raises(ValueError, match="kept forever"):
        judgement.delete()


def test_the_sweep_judges_a_candidate_whose_rejudging_was_lost(
    detector, version, split, split_truth, users, run_tasks, settings, monkeypatch
):
    _submit(run_tasks, version, split, split_truth, users)
    monkeypatch.setattr(release_tasks.rejudge, "delay", lambda *a: None)  # the broker lost it
    run_tasks(criteria.set_criteria, detector, users["lead"], [IMPOSSIBLE])
    assert verdicts.verdict_of(version).state == "judging"
    settings.BENCHBOOK_QUEUED_GRACE_SECONDS = 0
    assert run_tasks(judging_queue.requeue_unjudged) == [version.pk]
    assert verdicts.verdict_of(version).state == "regression"
    assert judging_queue.requeue_unjudged() == []


def test_the_deployed_thresholds_give_the_operating_point(
    detector, version, split, split_truth, users, run_tasks, tmp_path
):
    """The suite's score threshold (0.3) and a class threshold (pedestrian 0.7) give
    per-class precision / recall / F1 as the engine scores them at that cut (P = TP /
    (TP + FP), R = TP / positives: common practice); the pooled row sums the classes'
    counts, each at its own cut. Shown in the evidence report."""
    import json

    from evaluation import engine
    from releases import selectors

    spec = {
        "splits": ["bay-night"],
        "score_threshold": 0.3,
        "class_thresholds": {"pedestrian": 0.7},
    }
    run_tasks(suites.set_suite, detector, users["lead"], {**spec, "protocols": ["coco"]})
    detections = detections_for(split_truth)
    _submit(run_tasks, version, split, split_truth, users)
    (tmp_path / "gt.json").write_text(json.dumps(split_truth))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = engine.load_truth(tmp_path / "gt.json")
    predictions = engine.load_predictions(tmp_path / "dt.json", truth)
    report = selectors.evidence_for(version)
    deployed = report["splits"][0]["deployed"]
    tp = fp = positives = 0.0
    for name in ("car", "pedestrian", "cyclist"):
        cut = 0.7 if name == "pedestrian" else 0.3
        expected = engine.evaluate(truth, predictions, "coco", score_threshold=cut)["per_class"]
        assert deployed["per_class"][name] == expected[name]["at_threshold"]
        tp += expected[name]["at_threshold"]["tp"]
        fp += expected[name]["at_threshold"]["fp"]
        positives += expected[name]["gt"]
    pooled = deployed["pooled"]
    assert (pooled["tp"], pooled["fp"], pooled["threshold"]) == (tp, fp, None)
    assert pooled["precision"] == pytest.approx(tp / (tp + fp))
    assert pooled["recall"] == pytest.approx(tp / positives)
    assert deployed["suite_version"] == 2


def test_the_pages_show_the_deployed_thresholds_and_their_numbers(
    client, detector, version, split, split_truth, users, run_tasks
):
    """The version page cuts its operating-point table at the suite's deployed
    thresholds (not the scorecard's 0.5) with the same numbers as the evidence report
    (checked against the engine above); the suite page lists each class's threshold;
    ``suites.deployed_threshold`` is the one function that gives it."""
    import re

    from releases import selectors

    spec = {
        "splits": ["bay-night"],
        "score_threshold": 0.3,
        "class_thresholds": {"pedestrian": 0.7},
    }
    run_tasks(suites.set_suite, detector, users["lead"], {**spec, "protocols": ["coco"]})
    assert suites.deployed_threshold(detector, "pedestrian") == 0.7
    assert suites.deployed_threshold(detector, "car") == 0.3
    assert suites.deployed_threshold(detector) == 0.3
    _submit(run_tasks, version, split, split_truth, users)
    deployed = selectors.evidence_for(version)["splits"][0]["deployed"]

    client.force_login(users["reviewer"])
    page = client.get(f"/versions/{version.pk}/").content.decode()
    table = re.search(
        rf'<table class="deployed" id="deployed-{split.pk}">(.*?)</table>', page, re.S
    )
    assert table, "no deployed-threshold table"
    rows = {
        cells[0]: cells[1:]
        for cells in (
            re.findall(r"<td[^>]*>(.*?)</td>", row)
            for row in re.findall(r"<tr>(.*?)</tr>", table[1])
        )
        if cells
    }

    def shown(value):
        return "—" if value is None else f"{value:.3f}"

    for name in ("car", "pedestrian", "cyclist"):
        numbers = deployed["per_class"][name]
        assert rows[name][:4] == [
            shown(0.7 if name == "pedestrian" else 0.3),
            shown(numbers["precision"]),
            shown(numbers["recall"]),
            shown(numbers["f1"]),
        ], (name, rows[name])
    assert rows["all classes"][0] == "per class"
    assert rows["all classes"][1] == shown(deployed["pooled"]["precision"])
    assert "suite</a> v2" in table[1]

    suite_page = client.get(f"/detectors/{detector.pk}/suite/").content.decode()
    listed = re.search(r'<table id="deployed-thresholds">(.*?)</table>', suite_page, re.S)[1]
    assert re.findall(r"<tr><td>(\w+)</td><td[^>]*>([\d.]+)</td><td>(\w+)</td></tr>", listed) == [
        ("car", "0.300", "score_threshold"),
        ("pedestrian", "0.700", "class_thresholds"),
        ("cyclist", "0.300", "score_threshold"),
    ]


def test_each_version_is_compared_with_the_approved_version_decided_last_but_itself(
    detector, users
):
    """The baseline reading keeps the two approvals decided last per detector: the newest
    approved version is judged against the one before it, every other version against
    the newest (rows written directly: only the baseline choice is under test)."""
    import datetime

    from django.utils import timezone

    start = timezone.now() - datetime.timedelta(days=10)
    approved = []
    for i in range(4):
        version = services.create_version(detector, f"3.{i}", users["engineer"])
        SignOff.objects.create(
            version=version,
            decision="approved",
            comment="ok",
            evidence={},
            decided_by=users["lead"],
            decided_at=start + datetime.timedelta(days=i),
        )
        approved.append(version)
    candidate = services.create_version(detector, "3.9", users["engineer"])
    found = verdicts.inputs_for([*approved, candidate])
    assert found[candidate.pk].baseline == approved[-1]
    assert found[approved[-1].pk].baseline == approved[-2]
    assert found[approved[0].pk].baseline == approved[-1]
