"""The level protocols' tables in Chromium: the version page's per-level table, the
split page's counts and the compare page's level deltas fit at 1280 and 390 px (the
layout test's measure; screenshots levels-* in test-artifacts/)."""

import json

from releases import services

from ..engine.test_difficulty import _write
from ..platform import test_level_protocols
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
