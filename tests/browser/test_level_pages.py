"""The level protocols' tables in Chromium: the version page's per-level table, the
split page's counts and the compare page's level deltas fit at 1280 and 390 px (the
layout test's measure; screenshots levels-* in test-artifacts/)."""

import json

from releases import services

from ..engine.test_difficulty import _write
from ..platform import test_level_protocols, test_level_rules
from ..platform.conftest import upload
from .conftest import BROWSER_MARKS, shot
from .test_layout import MEASURE, WIDTHS

pytestmark = BROWSER_MARKS
road = test_level_protocols.road  # the fixture: a KITTI label split, coco + kitti2d


def test_level_tables_fit_at_1280_and_390(page, live_server, road, users, run_tasks, tmp_path):
    run_tasks(
        services.submit_predictions,
        road["version"],
        road["split"],
        upload("dets.zip", road["predictions"]),
        users["engineer"],
    )
    worse = [[d for d in dets if d[0] != "Car"] for dets in road["detections"]]
    _write(tmp_path / "worse", road["scenes"], worse)
    candidate = services.create_version(road["detector"], "1.1", users["engineer"])
    run_tasks(
        services.submit_predictions,
        candidate,
        road["split"],
        upload("worse.zip", test_level_protocols._zip(tmp_path / "worse_det")),
        users["engineer"],
    )
    split = road["split"].pk
    pages = {
        "version": (f"/versions/{candidate.pk}/", f"#levels-kitti2d-{split}"),
        "split": (f"/splits/{split}/", "#road-levels-kitti2d"),
        "compare": (
            f"/detectors/{road['detector'].pk}/compare/"
            f"?reference={road['version'].pk}&candidate={candidate.pk}",
            f"#level-deltas-kitti2d-{split}",
        ),
    }
    found = {}
    for width, height in WIDTHS.items():
        page.set_viewport_size({"width": width, "height": height})
        for name, (path, table) in pages.items():
            assert page.goto(f"{live_server.url}{path}").status == 200, path
            assert page.locator(table).is_visible(), (name, table)
            problems = page.evaluate(MEASURE)
            if problems:
                found[f"{name}@{width}"] = problems
            page.locator(table).scroll_into_view_if_needed()
            shot(page, f"levels-{name}-{width}")
    assert not found, json.dumps(found, indent=1)


def test_the_history_chart_draws_moderate_ap_from_the_metric_selector(
    page, live_server, road, users, run_tasks
):
    """The metric selector's level choice (``AP@moderate``) fetches that level's series
    from the history API; the chart draws the stored moderate AP and the page fits at
    1280 and 390 px (screenshots history-level-*)."""
    test_level_rules._submit(road, run_tasks, users)
    page.goto(f"{live_server.url}/detectors/{road['detector'].pk}/")
    chart = "window.benchbookCharts['history-chart']"
    page.wait_for_function(f"window.benchbookCharts && {chart}")
    with page.expect_response(lambda r: "level=moderate" in r.url and r.ok):
        page.select_option("#history-class", "Car")
        page.select_option("#history-metric", "AP@moderate")
    page.wait_for_function(f"{chart}.options.scales.y.title.text.includes('at moderate')")
    card = road["version"].prediction_sets.get().evaluations.get(protocol="kitti2d").scorecard
    car = next(r.ap for r in card.slices.all() if (r.name, r.class_name) == ("moderate", "Car"))
    assert page.evaluate(f"{chart}.data.datasets[0].data") == [round(car, 4)]
    assert "metric=AP" in page.url and "level=moderate" in page.url
    # Loaded afresh at each width with the API's parameters (the address the selector
    # left): the page keeps the selection without script, and fits.
    found = {}
    for width, height in WIDTHS.items():
        page.set_viewport_size({"width": width, "height": height})
        page.reload()
        page.wait_for_function(f"window.benchbookCharts && {chart}")
        assert page.locator("#history-metric").input_value() == "AP@moderate"
        assert page.evaluate(f"{chart}.data.datasets[0].data") == [round(car, 4)]
        problems = page.evaluate(MEASURE)
        if problems:
            found[width] = problems
        shot(page, f"history-level-{width}")
    assert not found, json.dumps(found, indent=1)
