"""A rule's class and a detector's class match a split's category names in any case
(``class_thresholds.row_of``, the engine's ``name_key``: the project's rule, as for a
protocol's per-class IoU thresholds), everywhere the gate reads them: rule outcomes,
verdict, sign-off (service, API, client), version page, compare, history.

The split names its categories ``Car``, ``Pedestrian``, ``Cyclist``; the detector
declares ``car``, ``pedestrian``, ``cyclist``. Reference for the measured number:
pycocotools 2.0.11, run here on the same two files (``COCOeval`` with ``catIds`` the
pedestrian category alone: ``stats[0]`` is that class's AP). Two categories naming one
class in any case (``Car`` and ``car``) are read as neither: the outcome is *missing*
(the verdict incomplete), never a pass.
"""

import contextlib
import io
import json

import pytest

from evaluation import services as evaluation_services
from releases import criteria, selectors, services, tokens, verdicts
from releases.models import Outcome, SignOff

from .conftest import detections_for, split_dict, upload
from .test_client import client_home, run  # noqa: F401  (fixtures: the client process)
from .test_worker import worker  # noqa: F401

SPLIT_NAMES = ["Car", "Pedestrian", "Cyclist"]  # the detector's CLASSES, capitalised


def _truth(names=SPLIT_NAMES, seed=5):
    truth = split_dict(seed=seed)
    for category, name in zip(truth["categories"], names):
        category["name"] = name
    return truth


def _pycocotools_ap(truth, dets, category_name, tmp_path):
    """pycocotools 2.0.11's AP (stats[0]) of one category alone."""
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    (tmp_path / "gt.json").write_text(json.dumps(truth))
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO(str(tmp_path / "gt.json"))
        dt = gt.loadRes(dets)
        ev = COCOeval(gt, dt, "bbox")
        ev.params.catIds = [c["id"] for c in truth["categories"] if c["name"] == category_name]
        ev.evaluate()
        ev.accumulate()
        ev.summarize()
    return float(ev.stats[0])


def _rule(name, threshold, **more):
    return {
        "kind": "min_value",
        "metric": "AP",
        "class": name,
        "split": "*",
        "threshold": threshold,
        **more,
    }


def _submit(run_tasks, version, split, truth, users, seed=6):
    return run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(truth, seed=seed)),
        users["engineer"],
    )


@pytest.fixture
def scored(detector, users, run_tasks, tmp_path):
    """Version 2.0 judged on a split naming ``Pedestrian`` under a rule on
    ``pedestrian`` whose bar is 0.05 above pycocotools' AP of the class."""
    truth = _truth()
    split = evaluation_services.load_split(
        name="kerb-dusk", revision=1, truth=upload("kerb-dusk.json", truth)
    )
    ap = _pycocotools_ap(truth, detections_for(truth), "Pedestrian", tmp_path)
    assert 0 < ap < 0.95  # the bar below is reachable and missed
    criteria.set_criteria(
        detector, users["lead"], [_rule("pedestrian", ap + 0.05), _rule("car", 0.0)]
    )
    version = services.create_version(detector, "2.0", users["engineer"])
    _submit(run_tasks, version, split, truth, users)
    return version, split, truth, ap


@pytest.mark.django_db
def test_the_rule_is_measured_and_fails_for_the_verdict_service_and_api(scored, users):
    version, _, _, ap = scored
    verdict = verdicts.verdict_of(version)
    assert verdict.state == "regression"
    outcomes = {o.class_name: o for o in Outcome.objects.filter(version=version)}
    pedestrian = outcomes["pedestrian"]
    assert pedestrian.status == Outcome.Status.FAIL
    assert pedestrian.value == pytest.approx(ap, abs=1e-9)  # pycocotools 2.0.11
    assert outcomes["car"].status == Outcome.Status.PASS and outcomes["car"].value is not None

    with pytest.raises(services.DecisionError, match="override and needs a written"):
        services.sign_off(version, users["lead"], "approved", "ship it")
    assert SignOff.objects.count() == 0

    from rest_framework.test import APIClient

    lead = APIClient()
    lead.force_authenticate(users["lead"])
    refused = lead.post(
        f"/api/v1/versions/{version.pk}/sign-off/",
        {"decision": "approved", "comment": "ship it"},
        format="json",
    )
    assert refused.status_code == 409, refused.json()
    assert "override and needs a written justification" in refused.json()["message"]
    shown = lead.get(f"/api/v1/versions/{version.pk}/verdict/").json()
    assert shown["state"] == "regression"
    assert [o["class_name"] for o in shown["failing"]] == ["pedestrian"]


@pytest.mark.django_db
def test_the_version_page_table_is_filled(scored, users):
    version, _, _, ap = scored
    (entry,) = selectors.version_scorecards(version)
    assert [getattr(row, "class_name", None) for row in entry["classes"]] == SPLIT_NAMES
    assert entry["classes"][1].ap == pytest.approx(ap, abs=1e-9)  # pycocotools 2.0.11
    tags = dict(entry["tag_rows"])  # the page's AP-by-tag table, by the detector's classes
    assert set(tags) == {"night", "rain"}  # tests/engine/synthetic.py's tags
    assert all(
        values["pedestrian"] == dict(entry["tags"])[tag]["Pedestrian"]
        for tag, values in tags.items()
    )
    assert any(values["pedestrian"] is not None for values in tags.values())

    from rest_framework.test import APIClient

    lead = APIClient()
    lead.force_authenticate(users["lead"])
    results = lead.get(f"/api/v1/versions/{version.pk}/results/").json()
    (split_row,) = results["splits"]
    assert [c["class"] for c in split_row["classes"]] == SPLIT_NAMES


@pytest.mark.django_db
def test_history_reads_the_splits_row(scored, detector):
    _, _, _, ap = scored
    chart = selectors.history_chart(detector, class_name="pedestrian")
    (line,) = chart["series"]
    assert line["values"][-1] == pytest.approx(ap, abs=1e-4)  # four decimals kept


@pytest.mark.django_db
def test_compare_and_the_significance_rule_read_the_splits_rows(scored, detector, users, run_tasks):
    version, split, truth, _ = scored
    services.sign_off(version, users["lead"], "approved", "base", justification="test base")
    criteria.set_criteria(
        detector,
        users["lead"],
        [{"kind": "no_significant_drop", "metric": "AP", "class": "pedestrian", "split": "*"}],
    )
    other = services.create_version(detector, "2.1", users["engineer"])
    _submit(run_tasks, other, split, truth, users, seed=8)
    (outcome,) = Outcome.objects.filter(version=other)
    assert outcome.value is not None and outcome.baseline_value is not None
    assert outcome.low is not None and outcome.low <= outcome.value - outcome.baseline_value
    (compared,) = selectors.compare_versions(version, other)
    by_class = {d["class"]: d for d in compared["deltas"]}
    assert by_class["pedestrian"]["delta"] is not None
    assert by_class["pedestrian"]["interval"]  # the judged interval, by the outcome's class
    assert by_class["car"]["delta"] is not None
    assert set(compared["curves"]) == {"car", "pedestrian", "cyclist"}


@pytest.mark.django_db
def test_two_categories_naming_one_class_are_read_as_neither(detector, users, run_tasks):
    truth = _truth(["Car", "car", "pedestrian"])
    split = evaluation_services.load_split(
        name="kerb-twin", revision=1, truth=upload("kerb-twin.json", truth)
    )
    criteria.set_criteria(detector, users["lead"], [_rule("car", 0.0)])
    version = services.create_version(detector, "3.0", users["engineer"])
    _submit(run_tasks, version, split, truth, users)
    (outcome,) = Outcome.objects.filter(version=version)
    assert outcome.status == Outcome.Status.MISSING  # a 0.0 bar would pass either row
    assert "2 categories of this split name class 'car'" in outcome.detail
    assert verdicts.verdict_of(version).state == "incomplete"
    (entry,) = selectors.version_scorecards(version)
    assert entry["classes"][0] is None  # neither Car nor car shown as "car"


@pytest.mark.integration
@pytest.mark.django_db(transaction=True)
@pytest.mark.usefixtures("worker")
def test_the_client_blocks_on_the_measured_pedestrian_rule(
    live_server,
    detector,
    users,
    run,  # noqa: F811
    tmp_path,
):
    truth = _truth()
    evaluation_services.load_split(
        name="kerb-dusk", revision=1, truth=upload("kerb-dusk.json", truth)
    )
    ap = _pycocotools_ap(truth, detections_for(truth), "Pedestrian", tmp_path)
    criteria.set_criteria(detector, users["lead"], [_rule("pedestrian", ap + 0.05)])
    path = tmp_path / "p.json"
    path.write_text(json.dumps(detections_for(truth)))
    _, token = tokens.create_token(users["engineer"], "pipeline")
    code, out, err = run(
        "submit", "--url", live_server.url, "--token", token, "--detector", "Forward camera",
        "--version", "2.0", "--split", f"kerb-dusk={path}", "--wait", "--poll", "0.3",
    )  # fmt: skip
    assert code == 3, out + err
    assert "2.0: regression" in out
    assert any(" fail " in f" {line} " and "AP of pedestrian" in line for line in out.splitlines())
