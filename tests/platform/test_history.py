"""The history chart: one metric and class per read, a split name across revisions as
one line with the revision change marked (or each revision separately), on every entry
point (selector, page, API). Numbers are the stored scorecards' (the scorecards
themselves are checked against pycocotools in tests/engine)."""

import copy
import datetime
import importlib

import pytest
from django.urls import reverse
from django.utils import timezone
from rest_framework.test import APIClient

from evaluation import services as evaluation_services
from evaluation.models import ClassScore
from releases import selectors, services, tokens

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db
API = "/api/v1/"


@pytest.fixture
def relabelled(split, split_truth):
    """Revision 2 of the split's name: the same images, a few boxes fewer."""
    truth = copy.deepcopy(split_truth)
    truth["annotations"] = truth["annotations"][::2]
    return evaluation_services.load_split(
        name=split.name, revision=2, truth=upload("bay-night-r2.json", truth)
    )


@pytest.fixture
def two_revisions(detector, split, relabelled, split_truth, users, run_tasks):
    """1.0 and 1.1 on rev 1; 1.1 also on rev 2 (re-scored); 1.2 and 1.3 on rev 2 only."""
    start = timezone.now() - datetime.timedelta(days=30)
    plan = {"1.0": [split], "1.1": [split, relabelled], "1.2": [relabelled], "1.3": [relabelled]}
    versions = {}
    for i, (label, splits) in enumerate(plan.items()):
        version = services.create_version(
            detector, label, users["engineer"], created_at=start + datetime.timedelta(days=i)
        )
        for target in splits:
            run_tasks(
                services.submit_predictions,
                version,
                target,
                upload(f"{label}.json", detections_for(split_truth, seed=70 + i)),
                users["engineer"],
            )
        versions[label] = version
    return versions


def _stored(version, split, class_name="", field="ap"):
    """The number stored for a version on a split (its own set's evaluation)."""
    row = ClassScore.objects.get(
        class_name=class_name,
        scorecard__evaluation__protocol="coco",
        scorecard__evaluation__split=split,
        scorecard__evaluation__prediction_sets__version=version,
    )
    return round(getattr(row, field), 4)


def test_one_line_per_name_takes_the_newest_revision_and_marks_the_change(
    detector, split, relabelled, two_revisions
):
    chart = selectors.history_chart(detector)
    assert (chart["metric"], chart["class"], chart["view"]) == ("AP", "mean", "joined")
    (line,) = chart["series"]
    assert line["name"] == "bay-night"
    assert line["splits"] == [{"id": split.pk, "revision": 1}, {"id": relabelled.pk, "revision": 2}]
    v = two_revisions
    assert line["values"] == [
        _stored(v["1.0"], split),
        _stored(v["1.1"], relabelled),  # scored on both: the newest revision's number
        _stored(v["1.2"], relabelled),
        _stored(v["1.3"], relabelled),
    ]
    assert line["revisions"] == [1, 2, 2, 2]
    assert chart["changes"] == [{"series": "bay-night", "index": 1, "from": 1, "to": 2}]
    # The two revisions really give different numbers for the same predictions.
    assert _stored(v["1.1"], split) != _stored(v["1.1"], relabelled)


def test_each_revision_separately(detector, split, relabelled, two_revisions):
    chart = selectors.history_chart(detector, "AP50", "pedestrian", revisions="separate")
    first, second = chart["series"]
    v = two_revisions
    assert (first["name"], second["name"]) == ("bay-night rev 1", "bay-night rev 2")
    assert first["values"] == [
        _stored(v["1.0"], split, "pedestrian", "ap50"),
        _stored(v["1.1"], split, "pedestrian", "ap50"),
        None,
        None,
    ]
    assert first["revisions"] == [1, 1, None, None]
    assert second["values"][0] is None and None not in second["values"][1:]
    assert second["values"][1] == _stored(v["1.1"], relabelled, "pedestrian", "ap50")
    assert chart["changes"] == []  # a separate line never changes revision


def test_a_gap_does_not_hide_the_change(detector, split, relabelled, users, run_tasks, split_truth):
    """1.0 on rev 1, 1.1 on nothing scored, 1.2 on rev 2: the mark is at 1.2."""
    start = timezone.now() - datetime.timedelta(days=10)
    for i, target in enumerate([split, None, relabelled]):
        version = services.create_version(
            detector, f"2.{i}", users["engineer"], created_at=start + datetime.timedelta(days=i)
        )
        if target is not None:
            run_tasks(
                services.submit_predictions,
                version,
                target,
                upload(f"2.{i}.json", detections_for(split_truth, seed=90 + i)),
                users["engineer"],
            )
    chart = selectors.history_chart(detector)
    assert chart["series"][0]["revisions"] == [1, None, 2]
    assert chart["changes"] == [{"series": "bay-night", "index": 2, "from": 1, "to": 2}]


def test_identical_bytes_in_two_versions_give_both_their_point(
    detector, split, split_truth, users, run_tasks, rival_detector
):
    """The same file uploaded for two versions is stored and scored once; each version
    still gets its point. Another team's upload of the same bytes is not read."""
    same = detections_for(split_truth, seed=3)
    for label in ("1.0", "1.1"):
        version = services.create_version(detector, label, users["engineer"])
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload("same.json", same),
            users["engineer"],
        )
    theirs = services.create_version(rival_detector, "9.0", users["rival"])
    run_tasks(services.submit_predictions, theirs, split, upload("same.json", same), users["rival"])
    values = selectors.history_chart(detector)["series"][0]["values"]
    assert len(values) == 2 and values[0] == values[1] is not None
    assert [v["label"] for v in selectors.history_chart(rival_detector)["versions"]] == ["9.0"]


@pytest.mark.parametrize(
    "query, field",
    [
        ({"metric": "mAP"}, "metric"),
        ({"class": "tram"}, "class"),
        ({"revisions": "both"}, "revisions"),
    ],
)
def test_an_unknown_selection_is_refused_naming_the_parameter(
    detector, two_revisions, users, client, query, field
):
    with pytest.raises(selectors.HistoryError, match=f"^{field}: "):
        selectors.history_chart(
            detector,
            query.get("metric", "AP"),
            query.get("class", "mean"),
            query.get("revisions", "joined"),
        )
    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(users['engineer'], 't')[1]}")
    response = api.get(f"{API}detectors/{detector.pk}/history/", query)
    assert response.status_code == 400
    assert response.json()["errors"][0]["path"] == field
    client.force_login(users["engineer"])
    page = client.get(reverse("detector", args=[detector.pk]), query)
    assert page.status_code == 400
    assert f"{field}: " in page.content.decode()


def test_the_api_and_page_serve_the_selected_series(
    detector, split, relabelled, two_revisions, users, client
):
    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(users['engineer'], 't')[1]}")
    url = f"{API}detectors/{detector.pk}/history/"
    default = api.get(url).json()
    assert default == _jsonable(selectors.history_chart(detector))
    chosen = api.get(url, {"metric": "recall", "class": "car", "revisions": "separate"}).json()
    assert chosen == _jsonable(selectors.history_chart(detector, "recall", "car", "separate"))
    assert len(chosen["series"]) == 2 and chosen["changes"] == []

    client.force_login(users["engineer"])
    page = client.get(reverse("detector", args=[detector.pk]), {"metric": "AP75"})
    assert page.status_code == 200
    assert page.context["chart"]["metric"] == "AP75"
    html = page.content.decode()
    assert "mean AP75" in html and "rev 2" in html  # the table names each row's revision
    newest = page.context["table"][0]["values"]
    assert newest == [(_stored(two_revisions["1.3"], relabelled, "", "ap75"), 2, None)]


def test_another_teams_history_is_not_found(detector, two_revisions, users, client):
    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(users['rival'], 't')[1]}")
    assert api.get(f"{API}detectors/{detector.pk}/history/").status_code == 404
    client.force_login(users["rival"])
    assert client.get(reverse("detector", args=[detector.pk])).status_code == 404


def _jsonable(chart):
    import json

    return json.loads(json.dumps(chart))


def test_the_table_shows_a_page_of_versions_newest_first_with_their_badges(
    detector, two_revisions, users, client, monkeypatch
):
    page_view = importlib.import_module("frontend.views.detector")

    monkeypatch.setattr(page_view, "TABLE_ROWS", 3)
    client.force_login(users["engineer"])
    url = reverse("detector", args=[detector.pk])
    first = client.get(url, {"metric": "AP50"})
    assert [row["version"]["label"] for row in first.context["table"]] == ["1.3", "1.2", "1.1"]
    badges = selectors.version_badges(detector.versions.select_related("sign_off"))
    assert [row["state"] for row in first.context["table"]] == [
        badges[two_revisions[label].pk] for label in ("1.3", "1.2", "1.1")
    ]
    html = first.content.decode()
    assert "versions 1–3 of 4" in html and "metric=AP50&amp;page=2" in html
    second = client.get(url, {"metric": "AP50", "page": 2})
    assert [row["version"]["label"] for row in second.context["table"]] == ["1.0"]
    # The chart still holds every version.
    assert len(second.context["chart"]["versions"]) == 4


def test_each_version_is_dated_by_its_utc_creation_day(detector, users):
    """The chart's date is the UTC calendar day of ``created_at`` (read as text from the
    database): a second before and after midnight fall on two days."""
    midnight = datetime.datetime(2026, 3, 1, tzinfo=datetime.UTC)
    for label, at in (
        ("late", midnight - datetime.timedelta(microseconds=500_000)),
        ("early", midnight),
        ("noon", midnight + datetime.timedelta(hours=12, minutes=30)),
    ):
        services.create_version(detector, label, users["engineer"], created_at=at)
    chart = selectors.history_chart(detector)
    dates = {v["label"]: v["date"] for v in chart["versions"]}
    assert dates == {"late": "2026-02-28", "early": "2026-03-01", "noon": "2026-03-01"}
    assert [v["label"] for v in chart["versions"]] == ["late", "early", "noon"]


def _overhanging(split_truth):
    """Each box found again, but widened 20 px past the image's left edge: ``keep``
    scores the overhang as given (pycocotools' reading), ``clip`` cuts it at the edge,
    and the IoU and so AP differ (common practice: clipping changes IoU)."""
    return [
        {
            "image_id": a["image_id"],
            "category_id": a["category_id"],
            "bbox": [-20.0, a["bbox"][1], a["bbox"][0] + a["bbox"][2] + 20.0, a["bbox"][3]],
            "score": 0.9,
        }
        for a in split_truth["annotations"]
    ]


def test_a_box_policy_change_along_a_line_is_marked_on_every_point(
    detector, split, split_truth, users, run_tasks, client
):
    """1.0 scored under the suite's ``keep``, the suite then switched to ``clip``, 1.1
    scored under it: both on one line, each point saying its box policy and engine
    version, the change listed (``policy_changes``), the table naming each cell's
    policy, the API serving the same."""
    from evaluation.engine import ENGINE_VERSION

    from .conftest import set_suite_policy

    labels = ("1.0", "1.1")
    for n, label in enumerate(labels):
        if n:
            set_suite_policy(detector, users["lead"], box_policy="clip")
        version = services.create_version(detector, label, users["engineer"])
        sets = upload(f"{label}.json", _overhanging(split_truth))
        run_tasks(services.submit_predictions, version, split, sets, users["engineer"])
    chart = selectors.history_chart(detector)
    (line,) = chart["series"]
    assert line["box_policies"] == ["keep", "clip"]
    assert line["engine_versions"] == [ENGINE_VERSION, ENGINE_VERSION]
    assert line["values"][0] != line["values"][1]  # the same boxes, computed differently
    assert chart["policy_changes"] == [
        {"series": line["name"], "index": 1, "from": "keep", "to": "clip"}
    ]
    client.force_login(users["engineer"])
    page = client.get(reverse("detector", args=[detector.pk])).content.decode()
    assert "boxes keep</span>" in page and "boxes clip</span>" in page
    api = APIClient()
    api.force_authenticate(users["engineer"])
    body = api.get(f"{API}detectors/{detector.pk}/history/").json()
    assert body["policy_changes"] == chart["policy_changes"]
    assert body["series"][0]["box_policies"] == ["keep", "clip"]
