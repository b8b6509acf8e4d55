"""A level or pedestrian setup as a history series (``?metric=AP&level=moderate``,
``?metric=miss_rate&setup=reasonable``) on every entry point (selector, API, page),
read from the level rows the worker stores — miss rate included, in its own
``SliceScore.miss_rate`` column. The stored numbers are checked against the KITTI
devkit transliteration (``evaluate_object.cpp`` ``eval_class``; tests/engine/oracle.py)
and the pedestrian toolbox transliteration (``dbEval``/``bbGt evalRes``;
tests/engine/pedestrian_oracle.py)."""

import importlib
from types import SimpleNamespace

import pytest
from django.apps import apps
from django.db import IntegrityError, connection
from django.urls import reverse
from rest_framework.test import APIClient

from evaluation import levels, triggers
from evaluation.models import BenchmarkSplit, Evaluation, SliceScore
from releases import audit_check, selectors, tokens

from ..engine import oracle, pedestrian_oracle
from ..engine.test_pedestrian import _oracle_scene
from .test_level_protocols import road  # noqa: F401  (a fixture: a kitti2d suite)
from .test_level_rules import _submit
from .test_level_setups import walkers  # noqa: F401  (a fixture: the worker stores miss-rate)

pytestmark = pytest.mark.django_db
API = "/api/v1/"


def _api(user):
    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(user, 't')[1]}")
    return api


@pytest.fixture
def scored_road(road, users, run_tasks):  # noqa: F811
    _submit(road, run_tasks, users)
    assert Evaluation.objects.get(protocol="kitti2d").state == "done"
    return road


def test_moderate_ap_is_a_history_series_on_selector_api_and_page(scored_road, users, client):
    detector = scored_road["detector"]
    precision, _ = oracle.kitti_eval_class(
        "car", scored_road["scenes"], scored_road["detections"], 1
    )
    car_moderate, _ = oracle.kitti_ap(precision)  # devkit eval_class, moderate = difficulty 1
    chart = selectors.history_chart(detector, "AP", "Car", level="moderate")
    assert chart["protocol"] == "kitti2d" and chart["level"] == "moderate"
    assert chart["lower_is_better"] is False
    assert chart["series"][0]["values"] == [round(car_moderate, 4)]
    mean = selectors.history_chart(detector, "AP", "mean", level="moderate")
    card = Evaluation.objects.get(protocol="kitti2d").scorecard
    assert mean["series"][0]["values"] == [round(card.summary["AP"], 4)]  # the headline
    offered = {(s["metric"], s["level"]) for s in chart["sources"]}
    assert offered == {("AP", "easy"), ("AP", "moderate"), ("AP", "hard")}

    api = _api(users["engineer"])
    url = f"{API}detectors/{detector.pk}/history/"
    got = api.get(url, {"metric": "AP", "class": "Car", "level": "moderate"})
    assert got.status_code == 200
    assert got.json()["series"][0]["values"] == [round(car_moderate, 4)]

    client.force_login(users["engineer"])
    page = client.get(reverse("detector", args=[detector.pk]), {"metric": "AP@moderate"})
    assert page.status_code == 200
    html = page.content.decode()
    assert 'value="AP@moderate" selected' in html
    assert "mean AP at moderate (kitti2d" in html
    assert page.context["table"][0]["values"] == [(round(card.summary["AP"], 4), None, None)]
    # the address the chart's selector leaves (the API's parameters) serves the page too
    query = {"metric": "AP", "class": "Car", "revisions": "joined", "level": "moderate"}
    again = client.get(reverse("detector", args=[detector.pk]), query)
    assert again.status_code == 200
    assert again.context["chart"]["series"][0]["values"] == [round(car_moderate, 4)]
    assert 'value="AP@moderate" selected' in again.content.decode()


def test_reasonable_miss_rate_is_a_history_series_lower_is_better(walkers, users, client):  # noqa: F811
    detector = walkers["detector"]
    expected, _ = pedestrian_oracle.toolbox(_oracle_scene(walkers["scene"]), "reasonable")
    api = _api(users["engineer"])
    url = f"{API}detectors/{detector.pk}/history/"
    got = api.get(url, {"metric": "miss_rate", "class": "pedestrian", "setup": "reasonable"})
    assert got.status_code == 200, got.content
    body = got.json()
    assert body["protocol"] == "miss-rate" and body["lower_is_better"] is True
    assert body["series"][0]["values"] == [pytest.approx(round(expected, 4), abs=1e-12)]
    assert {"metric": "miss_rate", "level": "reasonable"}.items() <= body["sources"][0].items()

    client.force_login(users["engineer"])
    page = client.get(reverse("detector", args=[detector.pk]), {"metric": "miss_rate@reasonable"})
    html = page.content.decode()
    assert page.status_code == 200
    assert "miss_rate · reasonable (miss-rate) (lower is better)" in html
    assert "lower is better)</span></h2>" in html


@pytest.mark.parametrize(
    "query, field",
    [
        ({"metric": "AP", "level": "nightmare"}, "level"),
        ({"metric": "miss_rate", "level": "moderate"}, "metric"),
        ({"metric": "AP", "level": "moderate", "setup": "hard"}, "setup"),
    ],
)
def test_a_level_the_suite_does_not_offer_is_refused_naming_the_parameter(
    scored_road, users, client, query, field
):
    detector = scored_road["detector"]
    response = _api(users["engineer"]).get(f"{API}detectors/{detector.pk}/history/", query)
    assert response.status_code == 400
    assert response.json()["errors"][0]["path"] == field
    client.force_login(users["engineer"])
    page = client.get(reverse("detector", args=[detector.pk]), query)
    assert page.status_code == 400 and f"{field}: " in page.content.decode()


def test_miss_rate_rows_are_stored_and_audited(walkers):  # noqa: F811
    card = Evaluation.objects.get(protocol="miss-rate").scorecard
    rows = SliceScore.objects.filter(scorecard=card, kind="level")
    stored = {(r.name, r.class_name): r.miss_rate for r in rows}
    for setup, entry in card.result["levels"].items():
        assert stored[(setup, "")] == entry["miss_rate"]
        for name, row in entry["classes"].items():
            assert stored[(setup, name)] == row["miss_rate"]
    assert all(r.ap is None for r in rows)
    assert audit_check.check().ok
    triggers.remove(connection)  # as an owner could (the rows are append-only)
    rows.filter(name="reasonable", class_name="pedestrian").update(miss_rate=0.01)
    triggers.install(connection)
    report = audit_check.check()
    assert any("slice_miss_rate" in p for p in report.problems), report.problems


def test_the_migration_adds_rows_to_earlier_miss_rate_scorecards(walkers):  # noqa: F811
    card = Evaluation.objects.get(protocol="miss-rate").scorecard
    before = sorted(
        SliceScore.objects.filter(scorecard=card).values_list("name", "class_name", "miss_rate")
    )
    triggers.remove(connection)
    SliceScore.objects.filter(scorecard=card).delete()  # as stored before the column
    triggers.install(connection)
    migration = importlib.import_module("evaluation.migrations.0015_miss_rate_level_rows")
    migration.add_rows(apps, None)
    migration.add_rows(apps, None)  # a second run adds nothing
    after = sorted(
        SliceScore.objects.filter(scorecard=card).values_list("name", "class_name", "miss_rate")
    )
    assert after == before and len(after) > 4


def test_the_migration_counts_splits_frozen_before_road_counts(road):  # noqa: F811
    split = road["split"]
    stored = BenchmarkSplit.objects.get(pk=split.pk).road_counts
    triggers.remove(connection)
    BenchmarkSplit.objects.filter(pk=split.pk).update(road_counts=None)  # frozen before
    triggers.install(connection)
    migration = importlib.import_module("evaluation.migrations.0016_road_counts_of_older_splits")
    migration.count(apps, SimpleNamespace(connection=connection))
    assert BenchmarkSplit.objects.get(pk=split.pk).road_counts == stored
    with pytest.raises(IntegrityError):  # frozen again
        BenchmarkSplit.objects.filter(pk=split.pk).update(road_counts=None)
    assert levels.split_page(stored)["tables"]
