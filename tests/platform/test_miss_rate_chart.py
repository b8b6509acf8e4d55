"""The miss-rate-versus-FPPI chart of the pedestrian setups on the version and compare
pages, read from stored scorecards only.

The worker stores miss-rate scorecards (``evaluation.levels``: the engine's
``evaluate_setups`` output under ``result["levels"]``); the last test goes through it.
``store_miss_rate`` writes a scorecard in that shape directly, so the other tests can
pick the files and versions they need.
The curve points are the engine's, checked against the pedestrian toolbox in
tests/engine/test_pedestrian.py; here only that the pages show exactly them.
"""

import json
import re

import pytest

from evaluation import engine
from evaluation.models import Evaluation, Scorecard
from releases import services

from .conftest import detections_for, upload
from .test_level_setups import walkers  # noqa: F401  (a fixture: the worker stores miss-rate)

pytestmark = pytest.mark.django_db


def store_miss_rate(prediction_set, truth_dict, detections, tmp_path, protocol="miss-rate"):
    """A done miss-rate evaluation of this prediction set and its scorecard."""
    (tmp_path / "gt.json").write_text(json.dumps(truth_dict))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = engine.load_truth(tmp_path / "gt.json")
    output = engine.evaluate_setups(
        truth, engine.load_predictions(tmp_path / "dt.json", truth), protocol
    )
    primary = prediction_set.evaluations.get(protocol="coco")
    evaluation = Evaluation.objects.create(
        split=prediction_set.split,
        predictions=prediction_set.predictions,
        protocol=protocol,
        box_policy=primary.box_policy,
        scope=primary.scope,
        file_name=primary.file_name,
        state="done",
        progress=100,
        engine_version=engine.ENGINE_VERSION,
    )
    Scorecard.objects.create(
        evaluation=evaluation,
        protocol=protocol,
        protocol_version=output["protocol"]["version"],
        engine_version=engine.ENGINE_VERSION,
        split_sha256=prediction_set.split.sha256,
        predictions_sha256=prediction_set.predictions.sha256,
        summary={"MR": output["headline"], "level": "reasonable"},
        result={
            "kind": "levels",
            "metric": "MR",
            "value_key": "miss_rate",
            "lower_is_better": True,
            "levels": output["levels"],
            "protocol_record": output["protocol"],
        },
    )
    prediction_set.evaluations.add(evaluation)
    return output


@pytest.fixture
def two_versions(detector, split, split_truth, users, run_tasks, tmp_path):
    out = []
    for label, seed in (("1.4", 6), ("1.5", 9)):
        version = services.create_version(detector, label, users["engineer"])
        detections = detections_for(split_truth, seed=seed)
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload(f"{label}.json", detections),
            users["engineer"],
        )
        folder = tmp_path / label
        folder.mkdir()
        ps = version.prediction_sets.current().get()
        out.append((version, store_miss_rate(ps, split_truth, detections, folder)))
    detector.protocols = ["coco", "miss-rate"]  # as a suite naming it sets them
    detector.save(update_fields=["protocols"])
    return out


def _embedded(html, key):
    found = re.search(
        rf'<script id="missrate-data-{key}" type="application/json">(.*?)</script>', html, re.S
    )
    return json.loads(found.group(1)) if found else None


def test_version_page_embeds_the_stored_curves(client, users, split, two_versions):
    (version, output), _ = two_versions
    client.force_login(users["reviewer"])
    html = client.get(f"/versions/{version.pk}/").content.decode()
    data = _embedded(html, f"{split.pk}-0")
    assert data["protocol"] == "miss-rate" and data["series"] == ["1.4"]
    assert data["setups"] == ["reasonable", "small", "heavy", "all"]
    row = output["levels"]["reasonable"]["classes"]["pedestrian"]
    stored = data["curves"]["reasonable"]["pedestrian"]["1.4"]
    assert (
        stored["fppi"] == row["curve"]["fppi"] and stored["miss_rate"] == row["curve"]["miss_rate"]
    )
    assert stored["lamr"] == row["miss_rate"]
    assert data["means"]["reasonable"]["1.4"] == output["levels"]["reasonable"]["miss_rate"]
    assert 'data-chart="missrate"' in html and "Miss rate versus false positives per image" in html
    # one table of the setups' numbers: the per-setup table (mean row first), not a
    # second table of the means under the chart
    assert 'id="missrate-table-' not in html
    table = re.search(
        rf'<table class="levels" id="levels-miss-rate-{split.pk}">(.*?)</table>', html, re.S
    )
    mean_row = re.search(r"<tr><td>mean</td>(.*?)</tr>", table.group(1), re.S).group(1)
    assert f"{output['levels']['reasonable']['miss_rate']:.3f}" in mean_row


def test_compare_page_overlays_both_versions(client, users, detector, split, two_versions):
    (reference, ref_out), (candidate, cand_out) = two_versions
    client.force_login(users["reviewer"])
    html = client.get(
        f"/detectors/{detector.pk}/compare/?reference={reference.pk}&candidate={candidate.pk}"
    ).content.decode()
    data = _embedded(html, f"{split.pk}-0")
    assert data["series"] == ["1.4 (reference)", "1.5 (candidate)"]
    curves = data["curves"]["heavy"]["car"]
    for label, out in (("1.4 (reference)", ref_out), ("1.5 (candidate)", cand_out)):
        assert curves[label]["lamr"] == out["levels"]["heavy"]["classes"]["car"]["miss_rate"]
        assert curves[label]["fppi"] == out["levels"]["heavy"]["classes"]["car"]["curve"]["fppi"]


def test_no_chart_without_a_stored_miss_rate_result(
    client, users, detector, split, split_truth, run_tasks
):
    """A detector without a miss-rate protocol, or one whose result is not stored yet,
    shows no chart and no empty canvas."""
    version = services.create_version(detector, "1.4", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("1.4.json", detections_for(split_truth)),
        users["engineer"],
    )
    client.force_login(users["reviewer"])
    assert 'data-chart="missrate"' not in client.get(f"/versions/{version.pk}/").content.decode()
    detector.protocols = ["coco", "miss-rate"]
    detector.save(update_fields=["protocols"])
    assert 'data-chart="missrate"' not in client.get(f"/versions/{version.pk}/").content.decode()


def test_another_teams_identical_files_lend_no_curve(
    client, users, detector, rival_detector, split, split_truth, run_tasks, tmp_path
):
    """Scorecards are read through the set's own evaluations: the rival team's stored
    miss-rate result of the same bytes is not shown on this team's page."""
    detections = detections_for(split_truth)
    for owner, user in ((rival_detector, "rival"), (detector, "engineer")):
        version = services.create_version(owner, "1.4", users[user])
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload("same.json", detections),
            users[user],
        )
        if owner == rival_detector:
            folder = tmp_path / "rival"
            folder.mkdir()
            store_miss_rate(
                version.prediction_sets.current().get(), split_truth, detections, folder
            )
        else:
            ours = version
        owner.protocols = ["coco", "miss-rate"]
        owner.save(update_fields=["protocols"])
    client.force_login(users["reviewer"])
    assert 'data-chart="missrate"' not in client.get(f"/versions/{ours.pk}/").content.decode()


def test_the_worker_stored_result_is_what_the_page_draws(client, users, walkers):  # noqa: F811
    """End to end: a suite naming miss-rate, the worker scores and stores it
    (``evaluation.levels``), and the version page's chart shows exactly the stored
    curve of each setup and class."""
    version = walkers["version"]
    card = Evaluation.objects.get(protocol="miss-rate").scorecard
    client.force_login(users["reviewer"])
    html = client.get(f"/versions/{version.pk}/").content.decode()
    split_pk = version.prediction_sets.current().get().split_id
    data = _embedded(html, f"{split_pk}-0")
    assert data["series"] == ["1.0"] and data["default_class"] == "pedestrian"
    for setup, entry in card.result["levels"].items():
        for name, row in entry["classes"].items():
            shown = data["curves"][setup][name]["1.0"]
            assert shown["fppi"] == row["curve"]["fppi"], (setup, name)
            assert shown["miss_rate"] == row["curve"]["miss_rate"], (setup, name)
            assert shown["lamr"] == row["miss_rate"]
