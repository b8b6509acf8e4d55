"""Every rule kind on a level or setup (releases/level_rules.py): the significance rule
(paired image bootstrap over the level's stored per-image samples) and a tag on a level
rule (image weights 0/1) for min_value, max_drop and significance.

Sources outside the project: the tag's value equals the transliteration of the KITTI
object devkit (``oracle.kitti_eval_class``, from ``evaluate_object.cpp``) run on the
tag's images alone, and the pedestrian toolbox's transliteration
(``pedestrian_oracle.toolbox``, Dollár et al., TPAMI 2012) on a setup's tagged images.
The interval is the percentile bootstrap over images (Efron & Tibshirani 1993, ch. 6
and 13; the draws ``scipy.stats.bootstrap`` makes, see tests/engine/test_bootstrap.py),
recomputed here from the split's files with the engine's functions. Entry points: the
service, the API (criteria POST, outcomes, verdict), the criteria page, the version
page; tampered and older stored results; the demo (test_demo.py).
"""

import json
import zipfile

import numpy as np
import pytest
from django.conf import settings
from django.urls import reverse

from evaluation import services as evaluation_services
from evaluation.engine.bootstrap import paired_bootstrap
from evaluation.engine.difficulty import evaluate_levels_with_samples
from evaluation.engine.level_samples import level_statistic
from evaluation.models import Evaluation
from evaluation.storage import file_sha256
from releases import criteria, services, verdicts
from releases.models import AuditEvent, Outcome

from ..engine import oracle, pedestrian_oracle
from ..engine.test_difficulty import _random_scene, _write
from ..engine.test_pedestrian import _files, _oracle_scene
from .conftest import upload
from .test_level_protocols import KITTI_CLASSES, _zip
from .test_level_rules import _api
from .test_level_setups import _scene as _walk_scene

pytestmark = pytest.mark.django_db
API = "/api/v1/"
N_IMAGES = 60


def _night(image):
    return image % 3 == 0


@pytest.fixture
def tagged(tmp_path, team, users, run_tasks, django_capture_on_commit_callbacks):
    """A KITTI label split whose images table tags every third image ``night``; 1.0
    scored and approved (the baseline); 1.1 without car detections scored."""
    scenes, detections = _random_scene(np.random.default_rng(7), N_IMAGES)
    truth, predictions = _write(tmp_path / "gt", scenes, detections)
    table = "image_id,width,height,tags\n" + "".join(
        f"{i},1242,375,{'night' if _night(i) else 'day'}\n" for i in range(len(scenes))
    )
    split = evaluation_services.load_split(
        name="kerb-road",
        revision=1,
        truth=upload("labels.zip", _zip(tmp_path / "gt")),
        images=upload("images.csv", table),
    )
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(
            team, "Kerb road", KITTI_CLASSES, protocols=("coco", "kitti2d"), splits=["kerb-road"]
        )
    base = services.create_version(detector, "1.0", users["engineer"])
    run_tasks(
        services.submit_predictions,
        base,
        split,
        upload("dets.zip", _zip(tmp_path / "gt_det")),
        users["engineer"],
    )
    run_tasks(services.sign_off, base, users["lead"], "approved", "baseline")
    worse = [[d for d in dets if d[0] != "Car"] for dets in detections]
    worse_truth, worse_predictions = _write(tmp_path / "worse", scenes, worse)
    candidate = services.create_version(detector, "1.1", users["engineer"])
    run_tasks(
        services.submit_predictions,
        candidate,
        split,
        upload("dets.zip", _zip(tmp_path / "worse_det")),
        users["engineer"],
    )
    return {
        "scenes": scenes,
        "detections": detections,
        "worse": worse,
        "split": split,
        "detector": detector,
        "base": base,
        "candidate": candidate,
        "files": ((truth, predictions), (worse_truth, worse_predictions)),
    }


def _rule(**extra):
    return {"level": "moderate", "class": "mean", "split": "*", **extra}


def _card(version):
    return Evaluation.objects.get(protocol="kitti2d", prediction_sets__version=version).scorecard


def _judge(tagged, run_tasks, users, rules, version="candidate"):
    run_tasks(criteria.set_criteria, tagged["detector"], users["lead"], rules)
    verdict = verdicts.verdict_of(tagged[version])
    latest = tagged["detector"].criteria.order_by("-number").first()
    outcomes = Outcome.objects.filter(version=tagged[version], criteria=latest).order_by("id")
    return verdict, list(outcomes)


def _oracle_mean(scenes, detections, level="moderate"):
    """Mean AP_R40 over the classes the devkit counts boxes of (oracle per class)."""
    values = []
    for cls in ("car", "pedestrian", "cyclist"):
        precision, n_gt = oracle.kitti_eval_class(
            cls, scenes, detections, ("easy", "moderate", "hard").index(level)
        )
        if n_gt:
            values.append(oracle.kitti_ap(precision)[0])
    return float(np.mean(values))


def test_a_significant_drop_at_moderate_fails_with_the_bootstrap_interval(tagged, users, run_tasks):
    """No car detections in 1.1: car AP 0, a large drop; the paired interval excludes
    zero → fail. The interval is the bootstrap of the level's mean over the same
    draws (seed, replicates) recomputed from the split's files."""
    verdict, (outcome,) = _judge(
        tagged, run_tasks, users, [_rule(kind="no_significant_drop", tolerance=1.0)]
    )
    assert verdict.state == "regression", verdict.reasons
    assert outcome.status == "fail"
    before, after = _card(tagged["base"]).summary["AP"], _card(tagged["candidate"]).summary["AP"]
    assert (outcome.value, outcome.baseline_value) == (after, before)  # bit for bit
    (truth, predictions), (worse_truth, worse_predictions) = tagged["files"]
    _, base = evaluate_levels_with_samples(truth, predictions)
    _, cand = evaluate_levels_with_samples(worse_truth, worse_predictions)
    (expected, *_) = paired_bootstrap(
        lambda w: level_statistic(cand, "moderate", w),
        lambda w: level_statistic(base, "moderate", w),
        truth.n_images,
        n_resamples=settings.BENCHBOOK_BOOTSTRAP_RESAMPLES,
        seed=settings.BENCHBOOK_BOOTSTRAP_SEED,
    )
    assert (outcome.low, outcome.high) == (expected.low, expected.high)
    assert outcome.high < 0 and expected.estimate == after - before
    assert "95 % interval" in outcome.detail and "at moderate (kitti2d)" in outcome.detail
    # the compare page's ΔAP intervals are the primary protocol's: none from a level rule
    from releases import selectors

    (entry,) = selectors.compare_versions(tagged["base"], tagged["candidate"])
    assert all(d["interval"] is None for d in entry["deltas"]), entry["deltas"]


def test_the_baselines_own_predictions_are_no_significant_drop(tagged, users, run_tasks, tmp_path):
    """1.2 submits the baseline's file: Δ = 0 in every replicate (the same samples),
    interval [0, 0], a pass; per class."""
    same = services.create_version(tagged["detector"], "1.2", users["engineer"])
    _write(tmp_path / "same", tagged["scenes"], tagged["detections"])
    run_tasks(
        services.submit_predictions,
        same,
        tagged["split"],
        upload("dets.zip", _zip(tmp_path / "same_det")),
        users["engineer"],
    )
    tagged["same"] = same
    verdict, outcomes = _judge(
        tagged,
        run_tasks,
        users,
        [_rule(kind="no_significant_drop", **{"class": "*"})],
        version="same",
    )
    assert {o.class_name for o in outcomes} == {"Car", "Pedestrian", "Cyclist"}
    assert all(o.status == "pass" and (o.low, o.high) == (0.0, 0.0) for o in outcomes)


def test_a_tag_rule_reads_the_level_on_the_tags_images(tagged, users, run_tasks):
    """min_value with tag ``night``: the value equals the devkit transliteration run on
    the night images alone; max_drop and significance on the tag compare the same
    images of the baseline."""
    night = [i for i in range(len(tagged["scenes"])) if _night(i)]
    expected = _oracle_mean(
        [tagged["scenes"][i] for i in night], [tagged["detections"][i] for i in night]
    )
    worse = _oracle_mean([tagged["scenes"][i] for i in night], [tagged["worse"][i] for i in night])
    rules = [
        _rule(kind="min_value", threshold=0.0, tag="night"),
        _rule(kind="max_drop", tolerance=0.1, tag="night"),
        _rule(kind="no_significant_drop", tag="night"),
    ]
    verdict, (low, drop, significance) = _judge(tagged, run_tasks, users, rules)
    assert low.status == "pass" and low.value == pytest.approx(worse, abs=1e-15)
    assert "at moderate, tag night, (kitti2d)" in low.detail
    assert drop.status == "fail"
    assert drop.baseline_value == pytest.approx(expected, abs=1e-15)
    assert drop.value == pytest.approx(worse, abs=1e-15)
    delta = significance.value - significance.baseline_value
    assert delta == drop.value - drop.baseline_value < 0
    assert significance.low <= delta <= significance.high
    assert significance.status == ("fail" if significance.high < 0 else "not significant")
    # the whole split's number differs: the tag really restricts the images
    assert drop.baseline_value != _card(tagged["base"]).summary["AP"]
    # a tag no image carries: no data, never a pass on nothing
    verdict, (none,) = _judge(
        tagged, run_tasks, users, [_rule(kind="min_value", threshold=0.0, tag="fog")]
    )
    assert none.status == "no data" and "no image of" in none.detail


def test_an_older_level_result_without_samples_is_missing_and_says_rescore(
    tagged, users, run_tasks, tmp_path, monkeypatch
):
    """A level scorecard stored before the samples were kept holds the protocol output
    as JSON (its digest recorded): a significance or tag rule cannot be judged on it.
    1.2 is scored with the earlier writer (the output as JSON, as before)."""
    from evaluation import levels

    def older(self, path):
        with open(path, "w") as f:
            json.dump(self.output, f, sort_keys=True)

    monkeypatch.setattr(levels._SampleRecords, "save", older)
    older_version = services.create_version(tagged["detector"], "1.2", users["engineer"])
    # its own detections (no cyclists either), so this file is scored, not reused
    fewer = [[d for d in dets if d[0] != "Cyclist"] for dets in tagged["worse"]]
    _write(tmp_path / "older", tagged["scenes"], fewer)
    run_tasks(
        services.submit_predictions,
        older_version,
        tagged["split"],
        upload("dets.zip", _zip(tmp_path / "older_det")),
        users["engineer"],
    )
    tagged["older"] = older_version
    card = _card(older_version)
    assert card.records_sha256 == file_sha256(card.records.path)
    assert not zipfile.is_zipfile(card.records.path)  # the output as JSON, as before
    verdict, outcomes = _judge(
        tagged,
        run_tasks,
        users,
        [
            _rule(kind="no_significant_drop"),
            _rule(kind="min_value", threshold=0.0, tag="night"),
            _rule(kind="min_value", threshold=0.0),  # the stored number still serves
        ],
        version="older",
    )
    assert [o.status for o in outcomes] == ["missing", "missing", "pass"]
    assert all("re-score" in o.detail for o in outcomes[:2])
    assert verdict.state == "incomplete"


def test_a_changed_samples_file_is_missing_and_audited(tagged, users, run_tasks):
    path = _card(tagged["base"]).records.path
    with open(path, "r+b") as f:
        f.seek(200)
        f.write(b"\x00\x01")
    verdict, (outcome,) = _judge(tagged, run_tasks, users, [_rule(kind="no_significant_drop")])
    assert outcome.status == "missing" and "baseline:" in outcome.detail
    assert "does not match its hash" in outcome.detail
    assert verdict.state == "incomplete"
    assert AuditEvent.objects.filter(kind=AuditEvent.Kind.CONTENT_MISMATCH).exists()


def test_api_page_and_outcomes_show_a_level_significance_rule(
    tagged, users, client, run_tasks, django_capture_on_commit_callbacks
):
    lead = _api(users["lead"])
    url = f"{API}detectors/{tagged['detector'].pk}/criteria/"
    refused = lead.post(
        url, {"rules": [_rule(kind="min_value", threshold=0.5, size="small")]}, format="json"
    )
    assert refused.status_code == 400 and "rules[0].size" in str(refused.json())
    with django_capture_on_commit_callbacks(execute=True):  # the rejudging it queues
        saved = lead.post(
            url, {"rules": [_rule(kind="no_significant_drop", tag="night")]}, format="json"
        )
    assert saved.status_code == 201, saved.json()
    assert saved.json()["rules"][0] == {
        "kind": "no_significant_drop",
        "metric": "AP",
        "class": "mean",
        "split": "*",
        "tag": "night",
        "tolerance": 0.0,
        "confidence": 0.95,
        "level": "moderate",
    }
    candidate = tagged["candidate"]
    verdict = lead.get(f"{API}versions/{candidate.pk}/verdict/").json()
    assert verdict["state"] in ("regression", "pass"), verdict
    (outcome,) = lead.get(f"{API}outcomes/", {"version": candidate.pk}).json()["results"]
    low, high = outcome["interval"]
    assert low <= outcome["value"] - outcome["baseline_value"] <= high
    assert outcome["status"] == ("fail" if high < 0 else "not significant")
    assert "tag night" in outcome["detail"]
    client.force_login(users["reviewer"])
    page = client.get(reverse("version", args=[candidate.pk])).content.decode()
    assert "AP of mean at moderate, tag night, (kitti2d)" in page
    # the evidence report names the level and tag beside the interval; the primary
    # protocol's per-class ΔAP interval is not filled from a level's
    evidence = lead.get(f"{API}versions/{candidate.pk}/evidence/").json()
    (listed,) = evidence["outcomes"]
    assert (listed["level"], listed["tag"], listed["interval"]) == (
        "moderate",
        "night",
        [low, high],
    )
    for split in evidence["splits"]:
        assert all(c["delta_AP_interval"] == [None, None] for c in split.get("classes", []))
    report = client.get(reverse("evidence", args=[candidate.pk])).content.decode()
    assert "AP of mean at moderate, tag night, (kitti2d)" in report
    # the criteria page's form: the same validation, the field named
    client.force_login(users["lead"])
    shown = client.post(
        reverse("criteria", args=[tagged["detector"].pk]),
        {"rules": json.dumps([_rule(kind="no_significant_drop", confidence=1.5)])},
        follow=True,
    ).content.decode()
    assert "field &#x27;confidence&#x27;" in shown or "field 'confidence'" in shown
    saved_page = client.post(
        reverse("criteria", args=[tagged["detector"].pk]),
        {"rules": json.dumps([_rule(kind="no_significant_drop", tolerance=2.0)])},
        follow=True,
    )
    assert saved_page.status_code == 200
    assert tagged["detector"].criteria.order_by("-number").first().rules[0]["tolerance"] == 2.0


def test_a_setup_significance_and_tag_rule_is_lower_is_better(
    tmp_path, team, users, run_tasks, django_capture_on_commit_callbacks
):
    """Miss rate on the reasonable setup: a rise is the bad side. 1.1 drops every
    second detection; its tagged value equals the toolbox transliteration on the
    tag's images."""
    scene = _walk_scene(np.random.default_rng(3), 24)
    _files(tmp_path, scene)
    data = json.loads((tmp_path / "gt.json").read_text())
    for image in data["images"]:
        image["tags"] = ["wet"] if image["id"] % 2 else ["dry"]
    split = evaluation_services.load_split(
        name="kerb-walk", revision=1, truth=upload("gt.json", json.dumps(data).encode())
    )
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(
            team,
            "Kerb walkers",
            ["pedestrian", "people"],
            protocols=("coco", "miss-rate"),
            splits=["kerb-walk"],
        )
    base = services.create_version(detector, "1.0", users["engineer"])
    dt = (tmp_path / "dt.json").read_bytes()
    run_tasks(services.submit_predictions, base, split, upload("dt.json", dt), users["engineer"])
    run_tasks(services.sign_off, base, users["lead"], "approved", "baseline")
    thinned = [{**image, "dt": image["dt"][::2]} for image in scene]
    (tmp_path / "thin").mkdir()
    _files(tmp_path / "thin", thinned)
    candidate = services.create_version(detector, "1.1", users["engineer"])
    run_tasks(
        services.submit_predictions,
        candidate,
        split,
        upload("dt.json", (tmp_path / "thin" / "dt.json").read_bytes()),
        users["engineer"],
    )
    rule = {"metric": "miss_rate", "level": "reasonable", "class": "pedestrian", "split": "*"}
    rules = [
        {**rule, "kind": "no_significant_drop"},
        {**rule, "kind": "min_value", "threshold": 1.0, "tag": "wet"},
    ]
    run_tasks(criteria.set_criteria, detector, users["lead"], rules)
    verdicts.verdict_of(candidate)
    significance, tagged = Outcome.objects.filter(version=candidate).order_by("id")
    card = Evaluation.objects.get(
        protocol="miss-rate", prediction_sets__version=candidate
    ).scorecard
    stored = card.result["levels"]["reasonable"]["classes"]["pedestrian"]["miss_rate"]
    assert significance.value == stored and significance.value > significance.baseline_value
    assert significance.low <= significance.value - significance.baseline_value <= significance.high
    assert significance.status in ("fail", "not significant")  # a rise: the bad side
    assert "(lower is better)" in significance.detail
    wet = [thinned[i] for i in range(len(thinned)) if (i + 1) % 2]
    expected, _ = pedestrian_oracle.toolbox(_oracle_scene(wet), "reasonable")
    assert tagged.value == pytest.approx(expected, rel=1e-12) and tagged.status == "pass"
