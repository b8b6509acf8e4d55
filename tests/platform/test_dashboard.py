"""Dashboard pages: each renders real numbers, hides other teams, and costs a fixed
number of queries however many versions there are (no N+1)."""

import datetime

import pytest
from django.urls import reverse
from django.utils import timezone

from evaluation.models import ClassScore
from releases import selectors, services

from .conftest import detections_for, triggers_off, upload

pytestmark = pytest.mark.django_db


@pytest.fixture
def scored(detector, split, split_truth, users, run_tasks):
    """Versions 1.0 ... 1.3 scored on the split, each a little better."""
    versions = []
    start = timezone.now() - datetime.timedelta(days=30)
    for i, label in enumerate(["1.0", "1.1", "1.2", "1.3"]):
        version = services.create_version(
            detector, label, users["engineer"], created_at=start + datetime.timedelta(days=7 * i)
        )
        dets = detections_for(split_truth, seed=40 + i)
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload(f"{label}.json", dets),
            users["engineer"],
        )
        versions.append(version)
    return versions


def _pages(detector, split, versions):
    return [
        reverse("overview"),
        reverse("detector", args=[detector.pk]),
        reverse("version", args=[versions[-1].pk]),
        reverse("compare", args=[detector.pk]),
        reverse("split", args=[split.pk]),
        reverse("splits"),
    ]


def test_every_page_renders_for_a_member(client, users, detector, split, scored):
    client.force_login(users["engineer"])
    for url in _pages(detector, split, scored):
        response = client.get(url)
        assert response.status_code == 200, url


def test_the_split_page_links_every_version_scored_on_it(client, users, detector, split, scored):
    """The list is built from tuples with one URL prefix: each link is the version's
    own page (as ``reverse`` names it), in detector then creation order."""
    client.force_login(users["engineer"])
    html = client.get(reverse("split", args=[split.pk])).content.decode()
    links = [
        f'<a href="{reverse("version", args=[v.pk])}">Forward camera {v.label}</a>' for v in scored
    ]
    assert all(link in html for link in links)
    assert [html.index(link) for link in links] == sorted(html.index(link) for link in links)


def test_history_holds_every_version_in_time_order(detector, scored, split):
    chart = selectors.history_chart(detector, "AP", "pedestrian")
    assert [v["label"] for v in chart["versions"]] == ["1.0", "1.1", "1.2", "1.3"]
    (line,) = chart["series"]
    assert line["splits"] == [{"id": split.pk, "revision": split.revision}]
    series = line["values"]
    expected = [
        ClassScore.objects.get(
            scorecard__evaluation__predictions__original_name=f"{v}.json",
            scorecard__evaluation__protocol="coco",
            class_name="pedestrian",
        ).ap
        for v in ("1.0", "1.1", "1.2", "1.3")
    ]
    assert series == [round(v, 4) for v in expected]  # the chart carries four decimals
    assert selectors.history_chart(detector)["series"][0]["values"][0] is not None


def test_history_rounds_halfway_numbers_as_python_does(detector, scored, split):
    """0.00625 is a halfway case where numpy's fast np.round (0.0062) and Python's
    correctly rounded round() (0.0063) differ; the chart must match round()."""
    rows = ClassScore.objects.filter(class_name="car", scorecard__evaluation__protocol="coco")
    with triggers_off():  # planted: stored results are append-only
        rows.update(ap=0.00625, recall=None)
    chart = selectors.history_chart(detector, "AP", "car")
    assert chart["series"][0]["values"] == [round(0.00625, 4)] * 4 == [0.0063] * 4
    recall = selectors.history_chart(detector, "recall", "car")["series"][0]
    assert recall["values"] == [None] * 4 and recall["revisions"] == [None] * 4


def test_compare_defaults_to_newest_against_the_one_before(client, users, detector, scored):
    client.force_login(users["lead"])
    response = client.get(reverse("compare", args=[detector.pk]))
    assert (response.context["candidate"].label, response.context["reference"].label) == (
        "1.3",
        "1.2",
    )
    deltas = response.context["splits"][0]["deltas"]
    assert deltas[0]["class"] == "mean"
    classes = [d for d in deltas[1:] if d["delta"] is not None]
    assert [d["delta"] for d in classes] == sorted(d["delta"] for d in classes)  # worst first
    for d in classes:
        assert d["delta"] == pytest.approx(d["candidate"] - d["reference"])
    other = client.get(
        reverse("compare", args=[detector.pk]),
        {"reference": scored[0].pk, "candidate": scored[2].pk},
    )
    assert (other.context["reference"].label, other.context["candidate"].label) == ("1.0", "1.2")
    assert "do not replace, the safety validation" in other.content.decode()


def test_pages_of_another_team_are_404(client, users, detector, split, scored):
    client.force_login(users["rival"])
    for url in _pages(detector, split, scored)[1:4]:
        assert client.get(url).status_code == 404, url
    assert "Forward camera" not in client.get(reverse("overview")).content.decode()
    assert "1.3" not in client.get(reverse("split", args=[split.pk])).content.decode()


@pytest.mark.parametrize("page", ["overview", "detector", "version", "compare", "split"])
def test_query_count_does_not_grow_with_versions(
    client,
    users,
    detector,
    split,
    split_truth,
    scored,
    run_tasks,
    django_assert_max_num_queries,
    page,
):
    client.force_login(users["engineer"])

    def url():
        return {
            "overview": reverse("overview"),
            "detector": reverse("detector", args=[detector.pk]),
            "version": reverse("version", args=[scored[-1].pk]),
            "compare": reverse("compare", args=[detector.pk]),
            "split": reverse("split", args=[split.pk]),
        }[page]

    from django.db import connection
    from django.test.utils import CaptureQueriesContext

    with CaptureQueriesContext(connection) as few:
        client.get(url())
    for label in ("1.4", "1.5", "1.6"):
        version = services.create_version(detector, label, users["engineer"])
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload(f"{label}.json", detections_for(split_truth, seed=int(label[-1]) * 11)),
            users["engineer"],
        )
    with django_assert_max_num_queries(len(few.captured_queries)):
        client.get(url())


def test_scorecard_lists_the_summary_in_the_references_order(client, users, scored):
    """pycocotools' summarize order, even on databases whose JSON columns sort keys."""
    client.force_login(users["engineer"])
    page = client.get(reverse("version", args=[scored[-1].pk])).content.decode()
    positions = [
        page.index(f"<dt>{key}</dt>")
        for key in ("AP", "AP50", "AP75", "AP_small", "AR1", "AR100", "AR_large")
    ]
    assert positions == sorted(positions)
