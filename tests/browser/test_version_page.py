"""The version page in Chromium: the verdict and the sign-off form come first."""

import numpy as np
import pytest

from evaluation import services as evaluation_services
from releases import criteria, services

from ..engine.synthetic import make_detections, make_split
from ..platform.conftest import CLASSES, upload
from .conftest import ARTIFACTS, BROWSER_MARKS, shot

pytestmark = BROWSER_MARKS

# Every class on every split under three kinds of rule: dozens of outcomes.
RULES = [
    {"kind": "min_value", "metric": "AP50", "class": "*", "threshold": 0.9},
    {"kind": "max_drop", "metric": "AP", "class": "*", "tolerance": 0.1},
    {"kind": "no_significant_drop", "metric": "AP", "class": "*"},
    {"kind": "min_value", "metric": "recall", "class": "*", "threshold": 0.99},
    {"kind": "min_value", "metric": "AP75", "class": "*", "threshold": 0.9},
    {"kind": "min_value", "metric": "AP", "class": "mean", "threshold": 0.9},
    {"kind": "max_drop", "metric": "AP50", "class": "*", "tolerance": 0.1},
    {"kind": "min_value", "metric": "AP", "class": "*", "threshold": 0.9},
]


@pytest.fixture
def regression(detector, users, run_tasks, team, split, settings):
    """A baseline and a candidate that lost most pedestrians, judged on two splits."""
    settings.BENCHBOOK_BOOTSTRAP_RESAMPLES = 100
    rng = np.random.default_rng(77)
    loaded = []
    for name in ("bay-day", "ring-road"):
        truth = make_split(rng, n_images=40, n_classes=3, boxes_per_image=6, crowd_rate=0.0)
        for category, class_name in zip(truth["categories"], CLASSES):
            category["name"] = class_name
        loaded.append(
            (
                evaluation_services.load_split(
                    name=name, revision=1, truth=upload(f"{name}.json", truth)
                ),
                make_detections(rng, truth, hit_rate=0.9, false_per_image=1),
            )
        )
    versions = []
    for label in ("1.4", "1.5"):
        version = services.create_version(detector, label, users["engineer"])
        for split_row, detections in loaded:
            if label == "1.5":
                detections = [d for d in detections if d["category_id"] != 2 or rng.random() < 0.3]
            run_tasks(
                services.submit_predictions,
                version,
                split_row,
                upload(f"{label}-{split_row.name}.json", detections),
                users["engineer"],
            )
        versions.append(version)
    services.sign_off(versions[0], users["lead"], "approved", "baseline")
    run_tasks(criteria.set_criteria, detector, users["lead"], RULES)
    return versions[1]


FORM_PLACE = """() => {
  const form = document.querySelector('#sign-off-form');
  const button = form.querySelector('button[type=submit]').getBoundingClientRect();
  const top = form.getBoundingClientRect().top;
  const rowsAbove = [...document.querySelectorAll('main tr')].filter(tr => {
    const r = tr.getBoundingClientRect();
    return r.height > 0 && r.top < top;
  }).length;
  const outcomes = document.querySelectorAll('#verdict tbody tr').length;
  return {buttonBottom: button.bottom, top, rowsAbove, outcomes, height: window.innerHeight};
}"""


def test_the_sign_off_form_is_in_the_first_screen(page, live_server, regression):
    page.goto(f"{live_server.url}/versions/{regression.pk}/")
    assert page.locator("#verdict-state").inner_text() == "regression"
    place = page.evaluate(FORM_PLACE)
    shot(page, "version-decision-1280")
    assert place["outcomes"] > 40, place  # the verdict rests on many outcomes...
    assert place["buttonBottom"] <= place["height"], place  # ...yet the form is in view
    page.set_viewport_size({"width": 390, "height": 844})
    page.reload()
    place = page.evaluate(FORM_PLACE)
    assert place["rowsAbove"] <= 40, place
    shot(page, "version-decision-390")


OVERFLOW = "() => document.documentElement.scrollWidth - window.innerWidth"


@pytest.mark.parametrize("width", [1280, 390])
def test_the_provenance_names_the_box_policy_and_fits(
    page, live_server, detector, version, split, split_truth, users, run_tasks, width
):
    """Each split's provenance says the box policy its numbers were scored under and
    links the stored result's full protocol record; open, it fits the width."""
    from ..platform.conftest import detections_for

    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    page.set_viewport_size({"width": width, "height": 900})
    page.goto(f"{live_server.url}/versions/{version.pk}/")
    page.locator("details summary", has_text="Provenance").first.click()
    assert page.locator("dd.box-policy").first.inner_text() == "keep"
    link = page.locator("a", has_text="the stored result's protocol record")
    assert link.first.get_attribute("href").endswith("/result/")
    assert page.evaluate(OVERFLOW) <= 0
    page.locator("dd.box-policy").first.scroll_into_view_if_needed()
    page.screenshot(path=str(ARTIFACTS / f"version-provenance-{width}.png"))
