"""Re-scoring stored predictions on a new split revision (issue 15, item 3): one service
(``releases.rescore``) behind the page, the API and ``manage.py rescore``; leads only;
idempotent; the original upload's time and uploader kept; detections of removed images
dropped and counted; the gate judges candidates again (a re-scored baseline too) while
decisions stay as recorded.

Outside references: pycocotools 2.0.11 scores the stored file without the removed
image's detections to the same AP (its ``loadRes`` refuses the whole file, so the
platform's normal uploads keep refusing it too).
"""

import copy
import json

import pytest
from django.core.exceptions import PermissionDenied
from django.core.management import CommandError, call_command
from django.urls import reverse
from rest_framework.test import APIClient

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import Evaluation
from releases import audit_check, criteria, judging, rescore, services, suites, verdicts
from releases.audit import verify_audit
from releases.models import AuditEvent, Judgement, PredictionSet, SignOff

from ..engine.conftest import pycocotools_eval
from .conftest import detections_for, set_suite_policy, upload

pytestmark = pytest.mark.django_db


def _revision(truth, drop_image, seed_shift=1.0):
    """The split relabelled: one image removed (with its boxes), one box moved."""
    new = copy.deepcopy(truth)
    new["images"] = [i for i in new["images"] if i["id"] != drop_image]
    new["annotations"] = [a for a in new["annotations"] if a["image_id"] != drop_image]
    new["annotations"][0]["bbox"][0] += seed_shift
    return new


@pytest.fixture
def removed(split_truth):
    return split_truth["images"][0]["id"]


@pytest.fixture
def rev2_truth(split_truth, removed):
    return _revision(split_truth, removed)


def _load(truth, revision):
    return evaluation_services.load_split(
        name="bay-night", revision=revision, truth=upload(f"bay-night-{revision}.json", truth)
    )


@pytest.fixture
def uploaded(users, detector, split, split_truth, run_tasks):
    """Two versions with predictions scored on rev 1 (different seeds)."""
    out = []
    for label, seed in (("1.4", 6), ("1.5", 7)):
        version = services.create_version(detector, label, users["engineer"])
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload(f"p{label}.json", detections_for(split_truth, seed=seed)),
            users["engineer"],
        )
        out.append(version)
    return out


def _rows():
    return (
        PredictionSet.objects.count(),
        Evaluation.objects.count(),
        AuditEvent.objects.count(),
    )


def test_rescore_scores_the_stored_file_on_the_new_revision(
    users, detector, split, split_truth, rev2_truth, removed, uploaded, run_tasks, tmp_path
):
    rev2 = _load(rev2_truth, 2)
    result = run_tasks(rescore.rescore, detector, users["lead"], rev2)
    assert [o.status for o in result.outcomes] == ["rescored", "rescored"]
    for version, seed in zip(uploaded, (6, 7)):
        original = PredictionSet.objects.get(version=version, split=split)
        new = PredictionSet.objects.get(version=version, split=rev2)
        assert new.rescored_from == original and new.predictions == original.predictions
        assert (new.uploaded_at, new.uploaded_by) == (original.uploaded_at, users["engineer"])
        assert new.rescored_by == users["lead"] and new.rescored_at > original.uploaded_at
        assert new.file_name == original.file_name
        evaluations = list(new.evaluations.order_by("protocol"))
        assert [(e.protocol, e.state, e.unknown_images) for e in evaluations] == [
            ("coco", "done", "drop"),
            ("voc", "done", "drop"),
        ]
        detections = detections_for(split_truth, seed=seed)
        kept = [d for d in detections if d["image_id"] != removed]
        assert len(kept) < len(detections)  # the removed image had detections
        card = evaluations[0].scorecard
        assert card.result["counts"]["dropped_unknown_images"] == len(detections) - len(kept)
        assert card.split_sha256 == rev2.sha256
        # pycocotools on rev 2 and the file without the removed image's detections
        (tmp_path / "gt.json").write_text(json.dumps(rev2_truth))
        (tmp_path / "dt.json").write_text(json.dumps(kept))
        reference = pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
        assert card.summary["AP"] == pytest.approx(reference.stats[0], abs=1e-12)
        event = AuditEvent.objects.get(
            kind="predictions re-scored", subject=f"prediction-set:{new.pk}"
        )
        assert event.actor == "lead" and event.payload["from"]["prediction_set"] == original.pk
        assert event.payload["uploaded_by"] == "engineer"
    assert verify_audit()[0] is None and audit_check.check().ok


def test_running_it_again_creates_nothing(users, detector, rev2_truth, uploaded, run_tasks):
    rev2 = _load(rev2_truth, 2)
    run_tasks(rescore.rescore, detector, users["lead"], rev2)
    before = _rows()
    again = run_tasks(rescore.rescore, detector, users["lead"], rev2)
    assert _rows() == before
    assert {o.status for o in again.outcomes} == {"skipped"}
    assert all("already re-scored on" in o.reason for o in again.outcomes)


def test_normal_uploads_keep_refusing_images_outside_the_split(
    users, split_truth, rev2_truth, uploaded
):
    """Only a re-score drops: the same bytes uploaded to rev 2 are refused, naming the
    image (pycocotools' loadRes refuses them too), and nothing is stored."""
    rev2 = _load(rev2_truth, 2)
    before = _rows()
    with pytest.raises(engine.InputError) as error:
        services.submit_predictions(
            uploaded[0],
            rev2,
            upload("p1.4.json", detections_for(split_truth, seed=6)),
            users["engineer"],
        )
    assert "is not in the split" in str(error.value) and error.value.field == "image_id"
    assert _rows() == before


def test_only_leads_of_the_team_and_nothing_stored_otherwise(
    users, detector, rev2_truth, uploaded, rival_detector
):
    rev2 = _load(rev2_truth, 2)
    before = _rows()
    for name in ("engineer", "reviewer", "outsider", "rival"):
        with pytest.raises(PermissionDenied):
            rescore.rescore(detector, users[name], rev2)
    assert _rows() == before


def test_chosen_versions_only_and_foreign_ids_refused(
    users, detector, rev2_truth, uploaded, run_tasks, rival_detector
):
    rev2 = _load(rev2_truth, 2)
    other = services.create_version(rival_detector, "9.9", users["rival"])
    with pytest.raises(evaluation_services.UploadError) as error:
        rescore.rescore(detector, users["lead"], rev2, [uploaded[0].pk, other.pk])
    assert error.value.path == "versions"
    result = run_tasks(rescore.rescore, detector, users["lead"], rev2, [uploaded[1].pk])
    assert [(o.version, o.status) for o in result.outcomes] == [(uploaded[1], "rescored")]
    assert not PredictionSet.objects.filter(version=uploaded[0], split=rev2).exists()


def test_a_version_without_its_stored_file_is_skipped_and_named(
    users, detector, split, rev2_truth, uploaded, run_tasks
):
    rev2 = _load(rev2_truth, 2)
    lost = PredictionSet.objects.get(version=uploaded[0], split=split).predictions
    lost.file.storage.delete(lost.file.name)
    result = run_tasks(rescore.rescore, detector, users["lead"], rev2)
    by_label = {o.version.label: o for o in result.outcomes}
    assert by_label["1.4"].status == "skipped" and "missing" in by_label["1.4"].reason
    assert by_label["1.5"].status == "rescored"
    assert not PredictionSet.objects.filter(version=uploaded[0], split=rev2).exists()


def test_a_version_with_nothing_on_an_earlier_revision_is_skipped(
    users, detector, rev2_truth, uploaded, run_tasks
):
    rev2 = _load(rev2_truth, 2)
    services.create_version(detector, "2.0", users["engineer"])
    result = run_tasks(rescore.rescore, detector, users["lead"], rev2)
    skipped = [o for o in result.outcomes if o.status == "skipped"]
    assert [o.version.label for o in skipped] == ["2.0"]
    assert "no predictions on an earlier revision of bay-night" in skipped[0].reason


def test_own_upload_on_the_revision_is_left_alone(
    users, detector, split_truth, rev2_truth, removed, uploaded, run_tasks
):
    rev2 = _load(rev2_truth, 2)
    own = [d for d in detections_for(split_truth, seed=8) if d["image_id"] != removed]
    mine = run_tasks(
        services.submit_predictions, uploaded[0], rev2, upload("own.json", own), users["engineer"]
    )
    result = run_tasks(rescore.rescore, detector, users["lead"], rev2)
    first = result.outcomes[0]
    assert first.status == "skipped" and "already has its own predictions" in first.reason
    assert PredictionSet.objects.current().get(version=uploaded[0], split=rev2) == mine


def test_a_failed_original_is_re_scored_and_fails_with_its_message(
    users, detector, split, split_truth, rev2_truth, run_tasks, settings
):
    """An original whose evaluations failed (a class the split does not list, found by
    the worker, under the strict class option the lead picked) is re-scored like any
    stored file, under the suite's policy, and fails again on the revision with the
    engine's message naming file, record and field; the version is incomplete."""
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0  # checked by the worker, as a big file
    set_suite_policy(detector, users["lead"], unknown_classes="reject")
    version = services.create_version(detector, "1.3", users["engineer"])
    bad = detections_for(split_truth, seed=6)
    bad[-1]["category_id"] = 99
    run_tasks(
        services.submit_predictions, version, split, upload("bad.json", bad), users["engineer"]
    )
    assert set(Evaluation.objects.values_list("state", flat=True)) == {"failed"}
    rev2 = _load(rev2_truth, 2)
    run_tasks(rescore.rescore, detector, users["lead"], rev2)
    new = PredictionSet.objects.get(version=version, split=rev2)
    failed = list(new.evaluations.all())
    assert {e.state for e in failed} == {"failed"}
    assert all("bad.json" in e.error and "category_id" in e.error for e in failed)
    assert verdicts.verdict_of(version).state == "incomplete"


def test_a_revision_frozen_while_re_scoring_runs(
    users, detector, split_truth, rev2_truth, removed, uploaded, run_tasks
):
    """Rev 3 is frozen after the re-score on rev 2 was requested and before any worker
    ran: the evaluations score rev 2 as asked (never the newer one); a suite that
    follows the name then misses rev 3, and a re-score on rev 3 takes the rev 2 set as
    its source."""
    suites.set_suite(
        detector,
        users["lead"],
        {"splits": [{"name": "bay-night", "revision": None}], "protocols": ["coco", "voc"]},
    )
    rev2 = _load(rev2_truth, 2)
    with pytest.MonkeyPatch.context() as patch:  # no worker yet
        patch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
        rescore.rescore(detector, users["lead"], rev2)
    pending = list(Evaluation.objects.filter(state="queued"))
    assert pending and {e.split_id for e in pending} == {rev2.pk}
    rev3 = _load(_revision(rev2_truth, rev2_truth["images"][0]["id"], 2.0), 3)
    for evaluation in pending:
        run_tasks(evaluation_services.run_evaluation, evaluation.pk)
    assert {e.split_id for e in Evaluation.objects.filter(pk__in=[e.pk for e in pending])} == {
        rev2.pk
    }
    assert Evaluation.objects.filter(pk__in=[e.pk for e in pending], state="done").count() == 4
    for version in uploaded:
        run_tasks(judging.judge, version.pk)
        verdict = verdicts.verdict_of(version)
        assert verdict.state == "incomplete" and verdict.missing == [str(rev3)]
    result = run_tasks(rescore.rescore, detector, users["lead"], rev3)
    assert {str(o.source.split) for o in result.outcomes} == {str(rev2)}
    for version in uploaded:
        run_tasks(judging.judge, version.pk)
        assert verdicts.verdict_of(version).state == "pass"


def test_the_gate_judges_candidates_again_and_decisions_stay(
    users, detector, split, rev2_truth, uploaded, run_tasks
):
    """Baseline 1.4 approved on rev 1; candidate 1.5 judged against it. Rev 2 is frozen
    (the suite follows the name): 1.5 misses it. Re-scoring 1.5 alone judges it again
    (no baseline on rev 2 yet: no data); re-scoring the decided baseline then judges the
    candidate again against the baseline's rev 2 numbers. The decision on 1.4 keeps the
    judgement it saw."""
    lead = users["lead"]
    run_tasks(
        suites.set_suite,
        detector,
        lead,
        {"splits": [{"name": "bay-night", "revision": None}], "protocols": ["coco", "voc"]},
    )
    rule = {"kind": "max_drop", "metric": "AP", "class": "mean", "split": "*", "tolerance": 100}
    run_tasks(criteria.set_criteria, detector, lead, [rule])
    baseline, candidate = uploaded
    run_tasks(judging.judge, baseline.pk)
    record, _ = services.sign_off(baseline, lead, "approved", "ships")
    run_tasks(judging.judge, candidate.pk)
    seen_by_decision = record.judgement
    rev2 = run_tasks(_load, rev2_truth, 2)
    assert verdicts.verdict_of(candidate).missing == [str(rev2)]

    run_tasks(rescore.rescore, detector, lead, rev2, [candidate.pk])
    first = verdicts.verdict_of(candidate)
    assert first.state == "pass" and first.judgement is not None
    outcome = first.judgement.outcomes.get()
    assert outcome.split == rev2 and outcome.status == "no data"
    assert "no baseline scored" in outcome.detail

    run_tasks(rescore.rescore, detector, lead, rev2, [baseline.pk])
    again = verdicts.verdict_of(candidate)
    assert again.judgement.pk > first.judgement.pk
    outcome = again.judgement.outcomes.get()
    assert outcome.status == "pass" and outcome.baseline_value is not None
    assert again.judgement.baseline_evaluations  # what it compared with, kept
    decided = verdicts.verdict_of(baseline)
    assert decided.decided and decided.judgement == seen_by_decision
    assert SignOff.objects.get(version=baseline).judgement == seen_by_decision
    assert not Judgement.objects.filter(version=baseline, pk__gt=seen_by_decision.pk).exists()


# Entry points -------------------------------------------------------------------------


def test_api_rescore_and_listing(users, detector, rev2_truth, uploaded, run_tasks, rival_detector):
    rev2 = _load(rev2_truth, 2)
    api = APIClient()
    url = f"/api/v1/detectors/{detector.pk}/rescore/"
    assert api.post(url, {"split": rev2.pk}, format="json").status_code in (401, 403)
    api.force_authenticate(users["engineer"])
    refused = api.post(url, {"split": rev2.pk}, format="json")
    assert refused.status_code == 403 and "only leads" in refused.json()["message"]
    api.force_authenticate(users["rival"])
    assert api.post(url, {"split": rev2.pk}, format="json").status_code == 404
    api.force_authenticate(users["lead"])
    assert api.post(url, {"split": 10**12}, format="json").status_code == 404
    assert api.post(url, {"split": "x"}, format="json").status_code == 400
    assert PredictionSet.objects.filter(split=rev2).count() == 0
    done = run_tasks(api.post, url, {"split": rev2.pk}, format="json")
    assert done.status_code == 200, done.content
    body = done.json()
    assert (body["rescored"], body["skipped"], body["split"]["revision"]) == (2, 0, 2)
    assert run_tasks(api.post, url, {"split": rev2.pk}, format="json").json()["rescored"] == 0
    listing = api.get(url).json()
    assert len(listing["rescored"]) == 2
    row = listing["rescored"][0]
    assert row["uploaded_by"] == "engineer" and row["rescored_by"] == "lead"
    assert all(e["state"] == "done" and e["dropped"] > 0 for e in row["evaluations"])
    schema = api.get("/api/schema/", {"format": "json"}).json()
    assert "/api/v1/detectors/{id}/rescore/" in schema["paths"]


def test_page_rescore_form(client, users, detector, rev2_truth, uploaded, run_tasks):
    rev2 = _load(rev2_truth, 2)
    url = reverse("rescore", args=[detector.pk])
    client.force_login(users["engineer"])
    page = client.get(url)
    assert page.status_code == 200 and b"Only leads" in page.content
    assert client.post(url, {"split": rev2.pk}).status_code == 403
    client.force_login(users["lead"])
    bad = client.post(url, {"split": "nope"})
    assert bad.status_code == 400 and b"choose a split revision" in bad.content
    response = run_tasks(client.post, url, {"split": rev2.pk, "versions": [uploaded[0].pk]})
    assert response.status_code == 302
    shown = client.get(url).content.decode()
    assert "Re-scored on bay-night rev 2: 1.4." in shown
    assert "detections dropped" in shown and "by engineer" in shown and "by lead" in shown
    assert PredictionSet.objects.filter(split=rev2).count() == 1
    version_page = client.get(reverse("version", args=[uploaded[0].pk])).content.decode()
    assert "Re-scored" in version_page and "from bay-night rev 1" in version_page


def test_page_is_a_404_for_another_team(client, users, detector, uploaded):
    client.force_login(users["rival"])
    assert client.get(reverse("rescore", args=[detector.pk])).status_code == 404


def test_command(users, detector, rev2_truth, uploaded, run_tasks):
    import io

    _load(rev2_truth, 2)
    with pytest.raises(CommandError, match="only leads"):
        call_command("rescore", detector.pk, "--split", "bay-night", "--user", "engineer")
    with pytest.raises(CommandError, match="no version 7.0"):
        call_command(
            "rescore", detector.pk, "--split", "bay-night", "--user", "lead", "--label", "7.0"
        )
    with pytest.raises(CommandError, match="no split bay-night rev 9"):
        call_command(
            "rescore", detector.pk, "--split", "bay-night", "--revision", "9", "--user", "lead"
        )
    out = io.StringIO()
    run_tasks(
        call_command,
        "rescore",
        detector.pk,
        "--split",
        "bay-night",
        "--user",
        "lead",
        "--label",
        "1.5",
        stdout=out,
    )
    assert "1.5: re-scored on bay-night rev 2 from bay-night rev 1" in out.getvalue()
    assert "1 re-scored, 0 skipped" in out.getvalue()


def test_admin_neither_adds_sets_nor_changes_what_is_evaluated(
    admin_client, users, detector, split, rev2_truth, uploaded, monkeypatch
):
    """The admin is no way round the service: no prediction set is added there, and a
    queued evaluation's image policy (an upload never drops) cannot be switched."""
    assert admin_client.get(reverse("admin:releases_predictionset_add")).status_code == 403
    rev2 = _load(rev2_truth, 2)
    monkeypatch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
    rescore.rescore(detector, users["lead"], rev2, [uploaded[0].pk])
    queued = Evaluation.objects.filter(state="queued", split=rev2).first()
    url = reverse("admin:evaluation_evaluation_change", args=[queued.pk])
    page = admin_client.get(url).content.decode()
    assert 'name="unknown_images"' not in page
    admin_client.post(
        url, {"state": "queued", "progress": 0, "attempts": 0, "unknown_images": "reject"}
    )
    queued.refresh_from_db()
    assert queued.unknown_images == "drop"
    changelist = admin_client.get(reverse("admin:releases_predictionset_changelist"))
    assert changelist.status_code == 200


def test_a_sharded_re_score_equals_the_one_process_run(
    split_truth, rev2_truth, removed, run_tasks, settings, monkeypatch
):
    """Above the shard limit the dropped detections are counted the same: the merged
    result equals the one-process result bit for bit (rev 2: 11 images, 4 shards)."""
    import uuid

    from evaluation import class_groups, sharding, tasks

    rev2 = _load(rev2_truth, 2)
    detections = detections_for(split_truth, seed=6)
    stored = evaluation_services.store_predictions(upload("p.json", detections))

    def request(scope):
        return run_tasks(
            evaluation_services.request_evaluations,
            rev2,
            stored,
            ["coco", "voc"],
            scope=scope,
            unknown_images="drop",
        )

    whole = {e.protocol: e for e in request("whole")}
    sent, group_sent = [], []
    monkeypatch.setattr(sharding, "send", lambda *args: sent.append(args))
    monkeypatch.setattr(class_groups, "send", lambda *args: group_sent.append(args))
    settings.BENCHBOOK_SHARD_ABOVE = 0
    settings.BENCHBOOK_SHARD_IMAGES = 3
    parts = request("sharded")
    assert len(sent) == 2
    for evaluation_id, claim, indexes in sent:
        for k in indexes:
            run_tasks(
                tasks.score_shard.apply, args=[evaluation_id, claim, k], task_id=str(uuid.uuid4())
            )
        run_tasks(tasks.merge_shards.apply, args=[evaluation_id, claim], task_id=str(uuid.uuid4()))
    for evaluation_id, claim, indexes in group_sent:
        for k in indexes:
            run_tasks(
                tasks.score_class_group.apply,
                args=[evaluation_id, claim, k],
                task_id=str(uuid.uuid4()),
            )
        run_tasks(
            tasks.finish_class_groups.apply, args=[evaluation_id, claim], task_id=str(uuid.uuid4())
        )
    dropped = sum(1 for d in detections if d["image_id"] == removed)
    for evaluation in parts:
        evaluation.refresh_from_db()
        assert evaluation.state == "done", evaluation.error
        ours, alone = evaluation.scorecard.result, whole[evaluation.protocol].scorecard.result
        assert ours["counts"]["dropped_unknown_images"] == dropped > 0
        assert json.dumps(ours, sort_keys=True) == json.dumps(alone, sort_keys=True)
