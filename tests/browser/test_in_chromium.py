"""Charts, compare selection and live progress in a real headless Chromium."""

import datetime

import pytest
from django.utils import timezone

from releases import services

from ..platform.conftest import detections_for, upload
from .conftest import BROWSER_MARKS
from .conftest import shot as _shot

pytestmark = BROWSER_MARKS


@pytest.fixture
def scored(detector, split_truth, users, run_tasks, team):
    from evaluation import services as evaluation_services

    split = evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("n.json", split_truth)
    )
    start = timezone.now() - datetime.timedelta(days=20)
    versions = []
    for i, label in enumerate(["1.0", "1.1", "1.2"]):
        version = services.create_version(
            detector, label, users["engineer"], created_at=start + datetime.timedelta(days=7 * i)
        )
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload(f"{label}.json", detections_for(split_truth, seed=60 + i)),
            users["engineer"],
        )
        versions.append(version)
    return split, versions


def test_history_chart_holds_every_version_and_follows_the_selectors(
    page, live_server, detector, scored
):
    page.goto(f"{live_server.url}/detectors/{detector.pk}/")
    page.wait_for_function("window.benchbookCharts && window.benchbookCharts['history-chart']")
    labels = page.evaluate("window.benchbookCharts['history-chart'].data.labels")
    assert labels == ["1.0", "1.1", "1.2"]
    first = page.evaluate("window.benchbookCharts['history-chart'].data.datasets[0].data")
    assert len(first) == 3 and all(0 <= v <= 1 for v in first)
    # Another metric and class is fetched from the history API, one series at a time.
    with page.expect_response(lambda r: "/history/?metric=AP50" in r.url and r.ok):
        page.select_option("#history-class", "pedestrian")
        page.select_option("#history-metric", "AP50")
    page.wait_for_function(
        "window.benchbookCharts['history-chart'].options.scales.y.title.text === 'AP50 (coco, 0–1)'"
    )
    after = page.evaluate("window.benchbookCharts['history-chart'].data.datasets[0].data")
    assert after != first and len(after) == 3
    assert "metric=AP50" in page.url and "class=pedestrian" in page.url
    _shot(page, "history")
    page.set_viewport_size({"width": 390, "height": 800})
    _shot(page, "history-390")


def test_history_marks_the_revision_change_and_separates_revisions_on_request(
    page, live_server, detector, scored, split_truth, users, run_tasks
):
    """bay-night rev 2 (boxes relabelled): version 1.3 is scored on it only, so the one
    bay-night line moves from rev 1 to rev 2 at 1.3, with a mark; "each revision
    separately" draws two lines."""
    import copy

    from evaluation import services as evaluation_services

    truth = copy.deepcopy(split_truth)
    truth["annotations"] = truth["annotations"][::2]
    relabelled = evaluation_services.load_split(
        name="bay-night", revision=2, truth=upload("n2.json", truth)
    )
    version = services.create_version(detector, "1.3", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        relabelled,
        upload("1.3.json", detections_for(split_truth, seed=63)),
        users["engineer"],
    )
    page.goto(f"{live_server.url}/detectors/{detector.pk}/")
    page.wait_for_function("window.benchbookCharts && window.benchbookCharts['history-chart']")
    chart = "window.benchbookCharts['history-chart']"
    assert page.evaluate(f"{chart}.data.datasets.map(d => d.label)") == ["bay-night"]
    assert page.evaluate(f"{chart}.data.datasets[0].revisions") == [1, 1, 1, 2]
    marks = page.evaluate(f"{chart}.options.plugins.revisionMarks.changes")
    assert marks == [{"series": "bay-night", "index": 3, "from": 1, "to": 2}]
    _shot(page, "history-revisions")
    with page.expect_response(lambda r: "revisions=separate" in r.url and r.ok):
        page.select_option("#history-revisions", "separate")
    page.wait_for_function(f"{chart}.data.datasets.length === 2")
    labels = page.evaluate(f"{chart}.data.datasets.map(d => d.label)")
    assert labels == ["bay-night rev 1", "bay-night rev 2"]
    assert page.evaluate(f"{chart}.options.plugins.revisionMarks.changes") == []
    second = page.evaluate(f"{chart}.data.datasets[1].data")
    assert second[:3] == [None, None, None] and second[3] is not None
    _shot(page, "history-revisions-separate")
    page.set_viewport_size({"width": 390, "height": 800})
    page.select_option("#history-revisions", "joined")
    page.wait_for_function(f"{chart}.data.datasets.length === 1")
    _shot(page, "history-revisions-390")


def test_history_marks_a_box_policy_change(
    page, live_server, detector, scored, split_truth, users, run_tasks
):
    """The suite switches from ``keep`` to ``clip`` before 1.3: 1.0-1.2 were decided
    (rejected: a decided version is not scored again under the new suite), so their
    points stay ``keep`` and 1.3's is ``clip``, and the chart says so (a dotted mark,
    each point's policy and engine in its tooltip data)."""
    from ..platform.conftest import set_suite_policy
    from ..platform.test_history import _overhanging

    split, earlier = scored
    for version in earlier:
        services.sign_off(version, users["lead"], "rejected", "kept for the record")
    set_suite_policy(detector, users["lead"], box_policy="clip")
    version = services.create_version(detector, "1.3", users["engineer"])
    sets = upload("1.3.json", _overhanging(split_truth))
    run_tasks(services.submit_predictions, version, split, sets, users["engineer"])
    page.goto(f"{live_server.url}/detectors/{detector.pk}/")
    page.wait_for_function("window.benchbookCharts && window.benchbookCharts['history-chart']")
    chart = "window.benchbookCharts['history-chart']"
    assert page.evaluate(f"{chart}.data.datasets[0].boxPolicies") == ["keep"] * 3 + ["clip"]
    marks = page.evaluate(f"{chart}.options.plugins.revisionMarks.policyChanges")
    assert marks == [{"series": "bay-night", "index": 3, "from": "keep", "to": "clip"}]
    assert page.locator("td .meta", has_text="boxes clip").count() == 1
    _shot(page, "history-box-policy")
    page.set_viewport_size({"width": 390, "height": 800})
    _shot(page, "history-box-policy-390")


def test_scorecard_draws_a_curve_per_class(page, live_server, scored):
    split, versions = scored
    page.goto(f"{live_server.url}/versions/{versions[-1].pk}/")
    chart_id = f"curves-{split.pk}"
    page.wait_for_function(f"window.benchbookCharts && window.benchbookCharts['{chart_id}']")
    names = page.evaluate(f"window.benchbookCharts['{chart_id}'].data.datasets.map(d => d.label)")
    assert names == ["car", "pedestrian", "cyclist"]
    points = page.evaluate(f"window.benchbookCharts['{chart_id}'].data.datasets[0].data.length")
    assert points > 10
    _shot(page, "scorecard")


def test_changing_the_compare_selection_changes_the_table(page, live_server, detector, scored):
    split, versions = scored
    page.goto(f"{live_server.url}/detectors/{detector.pk}/compare/")
    table = page.locator(f"#deltas-{split.pk}")
    before = table.inner_text()
    assert "1.1" in before and "1.2" in before
    page.select_option("#compare-reference", str(versions[0].pk))
    page.click("#compare-form button[type=submit]")
    page.wait_for_url("**reference=*")
    after = page.locator(f"#deltas-{split.pk}").inner_text()
    assert after != before and "1.0" in after
    assert page.evaluate(f"window.benchbookCharts['curves-{split.pk}'].data.datasets.length") == 2
    _shot(page, "compare")


def test_progress_bar_advances_while_a_real_worker_scores(
    page, live_server, detector, users, split_truth, worker, monkeypatch
):
    import time

    from evaluation import services as evaluation_services
    from evaluation.models import Evaluation
    from evaluation.services import queueing

    split = evaluation_services.load_split(
        name="ring-road", revision=1, truth=upload("r.json", split_truth)
    )
    version = services.create_version(detector, "2.0", users["engineer"])
    dispatch = queueing.dispatch
    with monkeypatch.context() as held:  # hold the jobs until the page shows them queued
        held.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
        prediction_set = services.submit_predictions(
            version,
            split,
            upload("2.0.json", detections_for(split_truth, seed=3)),
            users["engineer"],
        )
    page.goto(f"{live_server.url}/versions/{version.pk}/")
    assert page.locator("progress[data-poll]").count() == 2  # one bar per protocol
    seen = [
        page.evaluate("[...document.querySelectorAll('progress[data-poll]')].map(b => b.value)")
    ]
    for evaluation in Evaluation.objects.filter(predictions=prediction_set.predictions):
        dispatch(evaluation.pk)  # no transaction open: sent to the real worker now
    deadline = time.monotonic() + 90
    while time.monotonic() < deadline:
        seen.append(
            page.evaluate("[...document.querySelectorAll('progress[data-poll]')].map(b => b.value)")
        )
        states = page.evaluate(
            "[...document.querySelectorAll('.state')].map(s => s.textContent.trim())"
        )
        if states == ["done", "done"] and seen[-1] == [100, 100]:
            break
        time.sleep(0.1)
    assert states == ["done", "done"], states
    assert seen[0] == [0, 0] and seen[-1] == [100, 100]
    _shot(page, "progress-done")
