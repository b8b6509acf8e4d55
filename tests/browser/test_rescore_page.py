"""The re-score page in Chromium: a lead re-scores the versions on a new revision from
the form, the table lists what was re-scored with the dropped detections, and the page
fits at 1280 and 390 px (screenshots rescore-*)."""

import copy
import json

from evaluation import services as evaluation_services
from releases import services
from tests.platform.conftest import detections_for, upload

from .conftest import BROWSER_MARKS, shot
from .test_layout import MEASURE, WIDTHS

pytestmark = BROWSER_MARKS


def test_a_lead_re_scores_from_the_page(
    page, live_server, users, detector, split, split_truth, run_tasks
):
    for label, seed in (("1.4", 6), ("1.5", 7)):
        version = services.create_version(detector, label, users["engineer"])
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload(f"p{label}.json", detections_for(split_truth, seed=seed)),
            users["engineer"],
        )
    truth = copy.deepcopy(split_truth)
    removed = truth["images"][0]["id"]
    truth["images"] = truth["images"][1:]
    truth["annotations"] = [a for a in truth["annotations"] if a["image_id"] != removed]
    evaluation_services.load_split(
        name="bay-night", revision=2, truth=upload("bay-night-2.json", json.dumps(truth))
    )
    url = f"{live_server.url}/detectors/{detector.pk}/rescore/"
    page.goto(url)
    assert "1.4, 1.5" in page.inner_text("#rescore-choices")
    shot(page, "rescore-before-1280")
    page.click("#rescore-form button[type=submit]")  # tasks run in the server's thread
    page.wait_for_load_state()
    assert "Re-scored on bay-night rev 2: 1.4, 1.5." in page.inner_text("main")
    page.goto(url)
    assert page.locator("#rescore-nothing").is_visible()  # nothing left behind
    text = page.inner_text("#rescored")
    assert text.count("detections dropped") == 4, text  # two versions x coco, voc
    found = {}
    for width, height in WIDTHS.items():
        page.set_viewport_size({"width": width, "height": height})
        page.goto(url)
        problems = page.evaluate(MEASURE)
        if problems:
            found[width] = problems
        shot(page, f"rescore-{width}")
    assert not found, json.dumps(found, indent=1)
