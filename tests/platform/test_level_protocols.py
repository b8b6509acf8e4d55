"""A suite may name the KITTI 2D difficulty-level protocol (``kitti2d``) beside its
primary one: the worker scores it through ``evaluation.levels`` and stores the
moderate headline, one level row per level × class and the full protocol record. The
numbers are checked against a transliteration of the KITTI object devkit's
``evaluate_object.cpp`` (``cleanData``, ``computeStatistics``, ``getThresholds``,
``eval_class``; tests/engine/oracle.py) on the same label files."""

import io
import pathlib
import zipfile

import numpy as np
import pytest

from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit, Evaluation, SliceScore
from evaluation.services import UploadError
from releases import services, suites
from releases.suites import SuiteError

from ..engine import oracle
from ..engine.test_difficulty import _random_scene, _write
from .conftest import upload

pytestmark = pytest.mark.django_db
KITTI_CLASSES = ["Car", "Van", "Pedestrian", "Person_sitting", "Cyclist", "Truck"]


def _zip(folder):
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as z:
        for path in sorted(pathlib.Path(folder).rglob("*")):
            if path.is_file():
                z.write(path, path.relative_to(folder).as_posix())
    return buffer.getvalue()


@pytest.fixture
def road(tmp_path, team, users, django_capture_on_commit_callbacks):
    """A KITTI label split with occlusion, truncation and don't-care regions, its
    detections, and a detector whose suite names coco then kitti2d."""
    scenes, detections = _random_scene(np.random.default_rng(7), 60)
    _write(tmp_path / "gt", scenes, detections)
    split = evaluation_services.load_split(
        name="kerb-road", revision=1, truth=upload("labels.zip", _zip(tmp_path / "gt"))
    )
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(
            team, "Kerb road", KITTI_CLASSES, protocols=("coco", "kitti2d"), splits=["kerb-road"]
        )
    version = services.create_version(detector, "1.0", users["engineer"])
    return {
        "scenes": scenes,
        "detections": detections,
        "split": split,
        "detector": detector,
        "version": version,
        "predictions": _zip(tmp_path / "gt_det"),
    }


def test_kitti2d_is_scored_as_the_devkit_scores_it_and_stored_per_level(road, users, run_tasks):
    run_tasks(
        services.submit_predictions,
        road["version"],
        road["split"],
        upload("dets.zip", road["predictions"]),
        users["engineer"],
    )
    evaluation = Evaluation.objects.get(protocol="kitti2d")
    assert evaluation.state == "done", evaluation.error
    card = evaluation.scorecard
    assert card.protocol == "kitti2d" and card.protocol_version == 1
    record = card.result["protocol_record"]
    assert [lv["name"] for lv in record["levels"]] == ["easy", "moderate", "hard"]
    assert record["class_overlap"] == {"car": 0.7, "pedestrian": 0.5, "cyclist": 0.5}
    rows = {(r.name, r.class_name): r.ap for r in SliceScore.objects.filter(scorecard=card)}
    assert {r.kind for r in SliceScore.objects.filter(scorecard=card)} == {"level"}
    assert not card.classes.exists()  # a level protocol has no COCO-style class rows
    means = {}
    for level, difficulty in (("easy", 0), ("moderate", 1), ("hard", 2)):
        present = []
        for cls, name in (("car", "Car"), ("pedestrian", "Pedestrian"), ("cyclist", "Cyclist")):
            precision, n_gt = oracle.kitti_eval_class(
                cls, road["scenes"], road["detections"], difficulty
            )
            if n_gt == 0:
                assert rows[(level, name)] is None
                continue
            ap_r40, _ = oracle.kitti_ap(precision)  # devkit transliteration
            assert rows[(level, name)] == pytest.approx(ap_r40, abs=1e-12), (level, name)
            present.append(ap_r40)
        means[level] = sum(present) / len(present)
        assert rows[(level, "")] == pytest.approx(means[level], abs=1e-12)
    # headline: moderate AP over 40 recall positions (the KITTI benchmark's ranking level)
    assert card.summary["AP"] == pytest.approx(means["moderate"], abs=1e-12)
    assert card.summary["level"] == "moderate"
    assert evaluation_services.load_records(Evaluation.objects.get(protocol="coco").scorecard)


def test_a_stored_level_result_carries_the_full_record(road, users, run_tasks):
    """The stored kitti2d result has the keys of every other result (the CLI's JSON):
    counts, the protocol record, engine version, ground-truth fingerprint; the compare
    panel's rows (``protocol_differences``) read it against a coco result."""
    from evaluation.engine import ENGINE_VERSION, PROVENANCE_KEYS
    from releases.selectors.compare import protocol_differences

    from ..engine.test_provenance import RECORD_KEYS

    run_tasks(
        services.submit_predictions,
        road["version"],
        road["split"],
        upload("dets.zip", road["predictions"]),
        users["engineer"],
    )
    card = Evaluation.objects.get(protocol="kitti2d").scorecard
    coco = Evaluation.objects.get(protocol="coco").scorecard
    assert set(PROVENANCE_KEYS) <= set(card.result)
    assert RECORD_KEYS <= set(card.result["protocol_record"])
    assert card.result["engine_version"] == ENGINE_VERSION
    assert card.result["truth_fingerprint"] == coco.result["truth_fingerprint"]
    assert card.result["counts"]["images"] == coco.result["counts"]["images"]
    assert card.result["counts"]["dont_care_regions"] > 0
    settings = {row["setting"] for row in protocol_differences(coco, card)}
    assert {"name", "matching", "recall sampling", "tie order"} <= settings
    assert protocol_differences(card, card) == []


def test_the_split_page_counts_are_stored_when_frozen(road):
    split = BenchmarkSplit.objects.get(pk=road["split"].pk)
    counts = split.road_counts
    moderate = counts["protocols"]["kitti2d"]["levels"]["moderate"]
    n_gt = {
        name: oracle.kitti_eval_class(cls, road["scenes"], road["detections"], 1)[1]
        for cls, name in (("car", "Car"), ("pedestrian", "Pedestrian"), ("cyclist", "Cyclist"))
    }
    assert moderate == n_gt  # the devkit's n_gt of cleanData, per class
    regions = sum(1 for scene in road["scenes"] for o in scene if o[0] == "DontCare")
    assert counts["dont_care_regions"] == regions > 0
    given = [o for scene in road["scenes"] for o in scene if o[0] != "DontCare"]
    occlusion = dict(counts["occlusion"])
    assert occlusion["1 partly"] == sum(1 for o in given if o[6] == 1)
    truncation = dict(counts["truncation"])
    assert truncation["> 0.50"] == sum(1 for o in given if o[5] > 0.5)


def test_a_level_protocol_cannot_be_primary(team, detector, split):
    spec = {"splits": ["bay-night"], "protocols": ["kitti2d", "coco"]}
    with pytest.raises(SuiteError) as e:
        suites.validate_suite(detector, spec)
    assert e.value.path == "protocols[0]" and "primary" in str(e.value)
    spec["protocols"] = ["coco", "kitti2d"]
    assert suites.validate_suite(detector, spec)["protocols"] == ["coco", "kitti2d"]
    with pytest.raises(UploadError) as e:
        services.create_detector(team, "Levels first", ["car"], protocols=("kitti2d",))
    assert e.value.path == "protocols[0]" and "primary" in str(e.value)


def test_a_split_without_attributes_has_no_road_counts(split):
    assert split.road_counts is None


def test_version_page_shows_the_levels(road, users, run_tasks, client):
    run_tasks(
        services.submit_predictions,
        road["version"],
        road["split"],
        upload("dets.zip", road["predictions"]),
        users["engineer"],
    )
    card = Evaluation.objects.get(protocol="kitti2d").scorecard
    client.force_login(users["reviewer"])
    page = client.get(f"/versions/{road['version'].pk}/").content.decode()
    assert f'id="levels-kitti2d-{road["split"].pk}"' in page
    assert "moderate (headline)" in page
    assert f"{card.summary['AP']:.3f}" in page
    assert "AP under kitti2d" not in page  # not mistaken for a COCO-style AP


def test_the_split_page_shows_the_stored_counts(road, users, client):
    client.force_login(users["reviewer"])
    page = client.get(f"/splits/{road['split'].pk}/").content.decode()
    moderate = road["split"].road_counts["protocols"]["kitti2d"]["levels"]["moderate"]
    assert 'id="road-levels-kitti2d"' in page and 'id="road-buckets"' in page
    assert '<td>Car</td><td class="num">' in page
    assert f'<td class="num">{moderate["Car"]}</td>' in page
    assert "don't-care region" in page or "don&#x27;t-care region" in page


def test_the_api_gives_the_level_tables(road, users, run_tasks):
    from rest_framework.test import APIClient

    from releases import tokens

    run_tasks(
        services.submit_predictions,
        road["version"],
        road["split"],
        upload("dets.zip", road["predictions"]),
        users["engineer"],
    )
    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(users['reviewer'], 't')[1]}")
    body = api.get(f"/api/v1/versions/{road['version'].pk}/results/").json()
    (table,) = body["splits"][0]["levels"]
    card = Evaluation.objects.get(protocol="kitti2d").scorecard
    assert table["protocol"] == "kitti2d" and table["levels"] == ["easy", "moderate", "hard"]
    assert table["rows"][0]["values"][1] == card.summary["AP"]
    assert "kitti2d" not in body["splits"][0]["other_protocols"]
