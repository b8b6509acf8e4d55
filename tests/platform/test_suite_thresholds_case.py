"""A suite's per-class score thresholds name classes in any case (audit12 F2).

The detector's classes are ``car, pedestrian, cyclist``; the split ``bay-caps`` names
its categories ``Car, Pedestrian, Cyclist`` (an upload is accepted: detections carry
category ids). A threshold keyed ``Pedestrian`` or ``pedestrian`` is the pedestrian
class's deployed cut everywhere it is read: the suite page, the operating point on the
version page and in the evidence report, the cause pages and their API. Names compare
as the engine compares a protocol's per-class IoU thresholds (``name_key``), so the
platform and the engine agree. Each test failed before the fix (the key ``Pedestrian``
was refused; ``pedestrian`` was accepted, then the Pedestrian category was cut at the
suite's ``score_threshold``).

The numbers at a cut are checked against ``engine.evaluate(..., score_threshold=cut)``
(the engine's operating point, itself checked against pycocotools' matching in
tests/engine); P = TP / (TP + FP), R = TP / positives is common practice.
"""

import json
import re

import pytest
from django.urls import reverse
from rest_framework.test import APIClient

from evaluation import engine
from evaluation import services as evaluation_services
from releases import detectors, selectors, services, suites, tokens
from releases.client.http import _server_message
from releases.models import Detector
from releases.selectors import cause

from .conftest import detections_for, split_dict, upload

pytestmark = pytest.mark.django_db

CAPS = {"car": "Car", "pedestrian": "Pedestrian", "cyclist": "Cyclist"}


def _caps_truth():
    truth = split_dict(seed=5)
    for category in truth["categories"]:
        category["name"] = CAPS[category["name"]]
    return truth


def _load(name, truth):
    return evaluation_services.load_split(
        name=name, revision=1, truth=upload(f"{name}.json", truth)
    )


def _api(user):
    _, token = tokens.create_token(user, "ci")
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"Bearer {token}")
    return client


def _engine_at(tmp_path, truth, detections, cut):
    """The engine's per-class operating point of the whole file at one cut."""
    (tmp_path / "gt.json").write_text(json.dumps(truth))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    loaded = engine.load_truth(tmp_path / "gt.json")
    predictions = engine.load_predictions(tmp_path / "dt.json", loaded)
    return engine.evaluate(loaded, predictions, "coco", score_threshold=cut)["per_class"]


@pytest.fixture
def caps(detector, users, run_tasks):
    """``bay-caps`` (Car, Pedestrian, Cyclist) in the suite, pedestrian cut at 0.95,
    every other class at 0.3; version 1.4.0 scored on it."""
    truth = _caps_truth()
    split = _load("bay-caps", truth)
    run_tasks(
        suites.set_suite,
        detector,
        users["lead"],
        {
            "splits": ["bay-caps"],
            "protocols": ["coco"],
            "score_threshold": 0.3,
            "class_thresholds": {"pedestrian": 0.95},  # accepted before the fix, then unread
        },
    )
    version = services.create_version(detector, "1.4.0", users["engineer"])
    detections = detections_for(truth)
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections),
        users["engineer"],
    )
    return {"split": split, "truth": truth, "detections": detections, "version": version}


# The service: validation and lookup ----------------------------------------------------


def test_a_key_names_a_class_in_any_case_and_is_kept_in_the_detectors_spelling(detector):
    _load("bay-caps", _caps_truth())
    spec = {"splits": ["bay-caps"], "class_thresholds": {"PEDESTRIAN": 0.95, "Car": 0.2}}
    clean = suites.validate_suite(detector, spec)
    assert clean["class_thresholds"] == {"pedestrian": 0.95, "car": 0.2}


def test_two_keys_naming_one_class_are_refused_naming_both(detector):
    _load("bay-caps", _caps_truth())
    spec = {"splits": ["bay-caps"], "class_thresholds": {"pedestrian": 0.9, "Pedestrian": 0.95}}
    with pytest.raises(suites.SuiteError) as refused:
        suites.validate_suite(detector, spec)
    assert str(refused.value) == (
        "class_thresholds.Pedestrian: 'pedestrian' and 'Pedestrian' name one class "
        "(pedestrian): class names match in any case; give its threshold once"
    )
    assert refused.value.path == "class_thresholds.Pedestrian"


def test_an_unknown_key_is_refused_with_its_path_once(detector):
    _load("bay-caps", _caps_truth())
    with pytest.raises(suites.SuiteError) as refused:
        suites.validate_suite(detector, {"splits": ["bay-caps"], "class_thresholds": {"Tram": 0.4}})
    assert str(refused.value) == (
        "class_thresholds.Tram: 'Tram' is not a class of Forward camera (classes: car, "
        "pedestrian, cyclist; names match in any case)"
    )


def test_threshold_of_matches_in_any_case(detector, users, run_tasks):
    _load("bay-caps", _caps_truth())
    spec = {
        "splits": ["bay-caps"],
        "score_threshold": 0.3,
        "class_thresholds": {"pedestrian": 0.95},
    }
    suite = run_tasks(suites.set_suite, detector, users["lead"], spec)
    for name in ("pedestrian", "Pedestrian", "PEDESTRIAN"):
        assert suites.threshold_of(suite, name) == 0.95, name
        assert suites.deployed_threshold(detector, name) == 0.95, name
    assert suites.threshold_of(suite, "Car") == 0.3
    assert suites.threshold_of(suite) == 0.3
    assert suites.deployed_thresholds(suite, ["Car", "Pedestrian"]) == [
        ("Car", 0.3, False),
        ("Pedestrian", 0.95, True),
    ]


# Entry points: API (and the client's rendering of its refusal), pages, admin -----------


def test_the_api_accepts_any_case_and_refuses_with_the_path_once(detector, users, run_tasks):
    _load("bay-caps", _caps_truth())
    lead = _api(users["lead"])
    url = f"/api/v1/detectors/{detector.pk}/suite/"
    saved = run_tasks(
        lead.post,
        url,
        {"splits": ["bay-caps"], "class_thresholds": {"Pedestrian": 0.95}},
        format="json",
    )
    assert saved.status_code == 201, saved.json()
    assert saved.json()["class_thresholds"] == {"pedestrian": 0.95}

    bad = lead.post(url, {"splits": ["bay-caps"], "class_thresholds": {"Tram": 0.4}}, format="json")
    body = bad.json()
    assert bad.status_code == 400
    assert body["message"] == (
        "class_thresholds.Tram: 'Tram' is not a class of Forward camera (classes: car, "
        "pedestrian, cyclist; names match in any case)"
    )
    assert body["errors"] == [
        {
            "path": "class_thresholds.Tram",
            "message": "'Tram' is not a class of Forward camera (classes: car, pedestrian, "
            "cyclist; names match in any case)",
        }
    ]
    # the pipeline client prints the server's message as is
    shown = _server_message(400, bad.content)
    assert shown.count("class_thresholds.Tram") == 1, shown

    twice = lead.post(
        url,
        {"splits": ["bay-caps"], "class_thresholds": {"car": 0.2, "CAR": 0.3}},
        format="json",
    )
    assert twice.status_code == 400
    assert twice.json()["errors"][0]["path"] == "class_thresholds.CAR"
    assert "'car' and 'CAR' name one class (car)" in twice.json()["message"]
    assert detector.suites.count() == 2  # v1 and the one saved above


def test_the_api_creates_a_detector_with_a_threshold_in_any_case(team, users, run_tasks):
    _load("bay-caps", _caps_truth())
    body = {
        "team": team.pk,
        "name": "Yard cam",
        "classes": ["car", "pedestrian"],
        "suite": {"splits": ["bay-caps"], "class_thresholds": {"Pedestrian": 0.8}},
    }
    created = run_tasks(_api(users["lead"]).post, "/api/v1/detectors/", body, format="json")
    assert created.status_code == 201, created.json()
    detector = Detector.objects.get(name="Yard cam")
    assert suites.current_suite(detector).class_thresholds == {"pedestrian": 0.8}


def test_the_suite_page_saves_any_case_and_lists_the_split_classes_cut(
    client, detector, users, run_tasks
):
    _load("bay-caps", _caps_truth())
    client.force_login(users["lead"])
    url = reverse("suite", args=[detector.pk])
    text = json.dumps(
        {"splits": ["bay-caps"], "score_threshold": 0.3, "class_thresholds": {"Pedestrian": 0.95}}
    )
    response = run_tasks(client.post, url, {"suite": text})
    assert response.status_code == 302
    assert suites.current_suite(detector).class_thresholds == {"pedestrian": 0.95}
    page = client.get(url).content.decode()
    listed = re.search(r'<table id="deployed-thresholds">(.*?)</table>', page, re.S)[1]
    assert ("pedestrian", "0.950", "class_thresholds") in re.findall(
        r"<tr><td>(\w+)</td><td[^>]*>([\d.]+)</td><td>(\w+)</td></tr>", listed
    )
    twice = json.dumps({"splits": ["bay-caps"], "class_thresholds": {"car": 0.2, "Car": 0.3}})
    refused = client.post(url, {"suite": twice})
    assert refused.status_code == 400
    assert "class_thresholds.Car: &#x27;car&#x27; and &#x27;Car&#x27; name one class" in (
        refused.content.decode()
    )


def test_a_case_only_rename_of_a_class_keeps_its_threshold(detector, users, run_tasks):
    """``set_classes`` (the admin's and every command's way to change classes) refuses
    to drop a class a threshold names, but a case-only rename drops none."""
    _load("bay-caps", _caps_truth())
    spec = {"splits": ["bay-caps"], "class_thresholds": {"pedestrian": 0.95}}
    run_tasks(suites.set_suite, detector, users["lead"], spec)
    run_tasks(detectors.set_classes, users["lead"], detector, ["car", "Pedestrian", "cyclist"])
    assert suites.deployed_threshold(detector, "Pedestrian") == 0.95
    with pytest.raises(detectors.DetectorError, match="'pedestrian' has a threshold"):
        detectors.set_classes(users["lead"], detector, ["car", "cyclist"])


# Where the threshold is read: operating point, evidence, version page, cause pages ----


def test_the_operating_point_cuts_each_category_at_its_class_threshold(caps, tmp_path):
    expected = {
        name: _engine_at(tmp_path, caps["truth"], caps["detections"], cut)[name]["at_threshold"]
        for name, cut in (("Car", 0.3), ("Pedestrian", 0.95), ("Cyclist", 0.3))
    }
    at_half = _engine_at(tmp_path, caps["truth"], caps["detections"], 0.5)
    assert expected["Pedestrian"] != at_half["Pedestrian"]["at_threshold"]  # the cut tells
    deployed = selectors.evidence_for(caps["version"])["splits"][0]["deployed"]
    assert deployed["per_class"] == expected
    assert deployed["pooled"]["tp"] == sum(e["tp"] for e in expected.values())


def test_the_version_page_shows_the_detectors_classes_at_their_cut(client, caps, users):
    client.force_login(users["reviewer"])
    page = client.get(f"/versions/{caps['version'].pk}/").content.decode()
    split = caps["split"]
    table = re.search(
        rf'<table class="deployed" id="deployed-{split.pk}">(.*?)</table>', page, re.S
    )
    rows = {
        cells[0]: cells[1]
        for cells in (
            re.findall(r"<td[^>]*>(.*?)</td>", r) for r in re.findall(r"<tr>(.*?)</tr>", table[1])
        )
        if cells
    }
    assert (rows["car"], rows["pedestrian"], rows["cyclist"]) == ("0.300", "0.950", "0.300")


def test_the_cause_pages_cut_at_the_class_threshold(client, caps, users):
    version, split = caps["version"], caps["split"]
    pair = cause.pair_for(users["lead"], version.pk, split.pk)
    assert dict(zip(pair.classes, pair.thresholds.tolist())) == {
        "Car": 0.3,
        "Pedestrian": 0.95,
        "Cyclist": 0.3,
    }
    api = _api(users["lead"]).get(f"/api/v1/versions/{version.pk}/images/", {"split": split.pk})
    assert api.status_code == 200 and api.json()["thresholds"]["Pedestrian"] == 0.95
    client.force_login(users["lead"])
    page = client.get(reverse("image-list", args=[version.pk]) + f"?split={split.pk}")
    assert "score ≥ 0.30 (Pedestrian ≥ 0.95)" in page.content.decode()
    start = client.get(
        reverse("image-list", args=[version.pk]) + f"?split={split.pk}&class=Pedestrian"
    )
    assert start.status_code == 200


def test_car_in_one_split_and_car_in_another_take_one_threshold(
    detector, split, split_truth, users, run_tasks, tmp_path
):
    """``bay-night`` names its category ``car``, ``bay-caps`` ``Car``: the suite's
    ``car`` threshold cuts both."""
    caps_truth = _caps_truth()
    caps_split = _load("bay-caps", caps_truth)
    spec = {
        "splits": ["bay-night", "bay-caps"],
        "protocols": ["coco"],
        "score_threshold": 0.3,
        "class_thresholds": {"car": 0.9},
    }
    run_tasks(suites.set_suite, detector, users["lead"], spec)
    version = services.create_version(detector, "2.0", users["engineer"])
    for s, truth in ((split, split_truth), (caps_split, caps_truth)):
        run_tasks(
            services.submit_predictions,
            version,
            s,
            upload("p.json", detections_for(truth)),
            users["engineer"],
        )
    report = {e["split"]: e["deployed"] for e in selectors.evidence_for(version)["splits"]}
    for s, truth, name in ((split, split_truth, "car"), (caps_split, caps_truth, "Car")):
        expected = _engine_at(tmp_path, truth, detections_for(truth), 0.9)[name]["at_threshold"]
        assert report[str(s)]["per_class"][name] == expected, s
        pair = cause.pair_for(users["lead"], version.pk, s.pk)
        assert pair.thresholds[pair.classes.index(name)] == 0.9


def test_categories_sharing_a_name_both_take_its_threshold(detector, users, run_tasks, tmp_path):
    """Two categories named ``Car`` (shown ``Car (id 1)``, ``Car (id 3)``): the suite's
    ``car`` threshold is each one's cut, as the engine's per-class IoU thresholds apply
    to every category of a name (``Protocol.threshold_table``)."""
    truth = _caps_truth()
    truth["categories"][2]["name"] = "Car"  # Cyclist's category, id 3
    shared = _load("bay-shared", truth)
    spec = {
        "splits": ["bay-shared"],
        "protocols": ["coco"],
        "score_threshold": 0.3,
        "class_thresholds": {"car": 0.9},
    }
    run_tasks(suites.set_suite, detector, users["lead"], spec)
    version = services.create_version(detector, "3.0", users["engineer"])
    detections = detections_for(truth)
    run_tasks(
        services.submit_predictions,
        version,
        shared,
        upload("p.json", detections),
        users["engineer"],
    )
    pair = cause.pair_for(users["lead"], version.pk, shared.pk)
    cuts = dict(zip(pair.classes, pair.thresholds.tolist()))
    assert cuts == {"Car (id 1)": 0.9, "Pedestrian": 0.3, "Car (id 3)": 0.9}, cuts
    per_class = selectors.evidence_for(version)["splits"][0]["deployed"]["per_class"]
    at_cut = _engine_at(tmp_path, truth, detections, 0.9)
    for name in ("Car (id 1)", "Car (id 3)"):
        assert per_class[name] == at_cut[name]["at_threshold"], name


def test_the_admin_renames_a_class_in_case_and_keeps_its_threshold(
    client, detector, users, run_tasks
):
    """The admin changes classes through ``set_classes``: a case-only rename of a class
    with a threshold is saved; dropping that class is refused, naming it."""
    from .test_gate_what_was_judged import _admin_form, _superuser

    _load("bay-caps", _caps_truth())
    spec = {"splits": ["bay-caps"], "class_thresholds": {"pedestrian": 0.95}}
    run_tasks(suites.set_suite, detector, users["lead"], spec)
    _superuser(client)
    renamed = json.dumps(["car", "PEDESTRIAN", "cyclist"])
    url, data = _admin_form(client, detector, classes=renamed)
    assert run_tasks(client.post, url, data).status_code == 302
    detector.refresh_from_db()
    assert detector.classes == ["car", "PEDESTRIAN", "cyclist"]
    assert suites.deployed_threshold(detector, "Pedestrian") == 0.95
    url, data = _admin_form(client, detector, classes=json.dumps(["car", "cyclist"]))
    refused = client.post(url, data)
    assert "&#x27;pedestrian&#x27; has a threshold in the suite" in refused.content.decode()
