"""A rule's class, a history's class and the level tables read class names by the one
rule, the engine's ``name_key`` (``str.casefold``), as thresholds and scorecard rows do.

Before, a rule's ``class`` had to be spelled exactly as the detector's class, the
history API's ``class`` too, and the level tables and level rules compared with
``str.lower``. Each test failed before its fix. Where ``lower`` and ``casefold``
disagree is Unicode's full case folding (CaseFolding.txt of the Unicode Character
Database, as Python's ``str.casefold`` documents it: "ß" folds to "ss", the Greek final
sigma "ς" to "σ", from memory); test_class_names_one_rule.py checks that they do.
"""

import json

import pytest
from django.urls import reverse

from evaluation import levels
from evaluation.engine.level_samples import LevelSamples
from releases import criteria, detectors, level_rules, services, verdicts
from releases.models import Outcome

from . import test_level_protocols
from .test_class_names_one_rule import _api
from .test_gate_what_was_judged import _detections, _version, _yard

pytestmark = pytest.mark.django_db
road = test_level_protocols.road  # the fixture: a KITTI label split, coco + kitti2d


# 2. a rule's class in any case ---------------------------------------------------------


def test_a_rule_names_its_class_in_any_case_and_keeps_the_detectors_spelling(
    team, users, run_tasks, django_capture_on_commit_callbacks
):
    """``Pedestrian`` names the class ``pedestrian`` (stored so); the candidate detects
    van exactly and car not at all (COCO-style AP 1 and 0, common practice): a rule on
    ``VAN`` passes and one on ``CAR`` fails, as the same rules on ``van`` and ``car``."""
    split = _yard()
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(
            team, "Yard cam", ["car", "van", "Straße"], splits=("yard-a",)
        )
    minimum = {"split": "*", "metric": "AP", "kind": "min_value", "threshold": 0.5}
    saved = criteria.set_criteria(
        detector,
        users["lead"],
        [minimum | {"class": "VAN"}, minimum | {"class": "STRASSE"}, minimum | {"class": "Car"}],
    )
    assert [r["class"] for r in saved.rules] == ["van", "Straße", "car"]
    candidate = _version(detector, "1.0", split, _detections((2,)), users, run_tasks)
    verdict = verdicts.verdict_of(candidate)
    assert verdict.state == "regression", verdict.reasons
    outcomes = {o.class_name: o for o in Outcome.objects.filter(version=candidate)}
    assert (outcomes["van"].status, outcomes["van"].value) == ("pass", 1.0)
    assert (outcomes["car"].status, outcomes["car"].value) == ("fail", 0.0)


def test_a_rule_naming_no_class_keeps_the_existing_message(detector, users):
    """``detector``: classes car, pedestrian, cyclist (tests/platform/conftest.py)."""
    for name, shown in (("Tram", "'Tram'"), (3, "3"), ("car ", "'car '")):
        rule = {"class": name, "split": "*", "kind": "min_value", "threshold": 0.5}
        with pytest.raises(criteria.CriteriaError) as refused:
            criteria.validate_rules(detector, [rule])
        assert str(refused.value) == (
            f"rule 1: field 'class': {shown} is not 'mean', '*' or one of car, pedestrian, cyclist"
        )
        assert refused.value.path == "rules[0].class"


@pytest.mark.parametrize(
    "given, stored", [("MEAN", "mean"), ("Mean", "mean"), (" mean ", "mean"), ("*", "*")]
)
def test_the_rule_words_are_read_as_detectors_reserved_reads_them(detector, given, stored):
    """The words a class may not be named (``detectors.reserved``: stripped, any case)
    are the words a rule reads as the mean or every class, stored as the judge reads
    them (``"mean"``, ``"*"``)."""
    assert detectors.reserved(given)
    rule = {"class": given, "split": "*", "kind": "min_value", "threshold": 0.5}
    assert criteria.validate_rules(detector, [rule])[0]["class"] == stored


def test_the_api_and_the_page_store_a_rule_in_the_detectors_spelling(detector, users, client):
    rule = {"class": "PEDESTRIAN", "split": "*", "kind": "min_value", "threshold": 0.5}
    response = _api(users["lead"]).post(
        f"/api/v1/detectors/{detector.pk}/criteria/", {"rules": [rule]}, format="json"
    )
    assert response.status_code == 201, response.content
    assert response.json()["rules"][0]["class"] == "pedestrian"
    client.force_login(users["lead"])
    rule["class"] = "Cyclist"
    client.post(reverse("criteria", args=[detector.pk]), {"rules": json.dumps([rule])})
    newest = detector.criteria.order_by("-number").first()
    assert newest.number == 2 and newest.rules[0]["class"] == "cyclist"


def test_a_history_names_its_class_in_any_case(
    team, users, run_tasks, django_capture_on_commit_callbacks
):
    """The history API's ``class`` reads as a rule's does: ``VAN`` is the class van
    (exactly detected: AP 1, common practice), ``MEAN`` the mean (car not detected:
    (1 + 0) / 2); an unknown name keeps its message."""
    split = _yard()
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(team, "Yard cam", ["car", "van"], splits=("yard-a",))
    _version(detector, "1.0", split, _detections((2,)), users, run_tasks)
    api = _api(users["lead"])
    url = f"/api/v1/detectors/{detector.pk}/history/"
    for asked, stored, value in (("VAN", "van", 1.0), ("MEAN", "mean", 0.5), ("Car", "car", 0.0)):
        chart = api.get(url, {"class": asked})
        assert chart.status_code == 200, chart.content
        assert chart.json()["class"] == stored
        assert [s["values"] for s in chart.json()["series"]] == [[value]]
    refused = api.get(url, {"class": "Tram"})
    assert refused.status_code == 400 and "'Tram' is not one of mean, car, van" in str(
        refused.json()
    )


# 3. level tables and level rules: casefold, not lower ----------------------------------


def _samples(classes):
    return LevelSamples("difficulty", "kitti2d", 0, ["moderate"], classes, {})


def test_class_position_compares_by_casefold():
    samples = _samples(["Car", "Straße", "ΟΔΟΣ"])
    assert levels.class_position(samples, "mean") == 0
    assert levels.class_position(samples, "car") == 1
    assert levels.class_position(samples, "STRASSE") == 2  # lower(): 'strasse' != 'straße'
    assert levels.class_position(samples, "οδοσ") == 3  # lower(): 'οδος' (final sigma)
    assert levels.class_position(samples, "Tram") is None
    # two classes naming one in any case: none is picked (as class_thresholds.row_of)
    assert levels.class_position(_samples(["Car", "car"]), "CAR") is None


def _level_card(classes, overlap):
    from types import SimpleNamespace

    rows = {c: {"AP_R40": 0.1 * (k + 1), "n_gt": k + 1} for k, c in enumerate(classes)}
    result = {
        "kind": "levels",
        "metric": "AP",
        "value_key": "AP_R40",
        "lower_is_better": False,
        "levels": {"moderate": {"AP_R40": 0.5, "classes": rows}},
        "protocol_record": {"levels": [{"name": "moderate"}], "class_overlap": overlap},
    }
    return SimpleNamespace(protocol="kitti2d", result=result, summary={"level": "moderate"})


def test_the_level_table_ranks_classes_by_casefold():
    """``class_overlap``'s order ranks the table's rows; a class named there in another
    case (``STRASSE`` for ``Straße``) takes its rank. With lower() it took none and
    went last (car, Zebra, Straße)."""
    card = _level_card(["Zebra", "Straße", "car"], {"car": [], "STRASSE": [], "zebra": []})
    rows = [row["class"] for row in levels.level_table(card)["rows"]]
    assert rows == ["mean", "car", "Straße", "Zebra"]


def test_a_level_rules_value_reads_the_class_by_casefold():
    card = _level_card(["Car", "Straße"], {})
    assert level_rules.value_of(card, "moderate", "STRASSE") == pytest.approx(0.2)
    assert level_rules.value_of(card, "moderate", "car") == pytest.approx(0.1)
    assert level_rules.value_of(card, "moderate", "mean") == 0.5
    assert level_rules.value_of(card, "moderate", "Tram") is None


def test_a_level_rule_on_a_class_in_another_case_is_judged_on_its_samples(road, users, run_tasks):
    """A significance rule on ``CAR`` (stored ``Car``) reads the Car column of the
    kitti2d samples (``class_position``): its value is the stored moderate Car AP, which
    test_level_protocols.py checks against the KITTI devkit transliteration. No
    baseline: *no data*, with the candidate's value kept."""
    from evaluation.models import Evaluation

    from .test_level_rules import _submit

    rule = {"kind": "no_significant_drop", "level": "moderate", "class": "CAR", "split": "*"}
    saved = criteria.set_criteria(road["detector"], users["lead"], [rule])
    assert saved.rules[0]["class"] == "Car"
    _submit(road, run_tasks, users)
    card = Evaluation.objects.get(protocol="kitti2d", prediction_sets__version=road["version"])
    stored = card.scorecard.result["levels"]["moderate"]["classes"]["Car"]["AP_R40"]
    outcome = Outcome.objects.get(version=road["version"])
    assert outcome.status == Outcome.Status.NO_DATA and 0 < stored < 1
    assert outcome.value == pytest.approx(stored, abs=1e-12)
