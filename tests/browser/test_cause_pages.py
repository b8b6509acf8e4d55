"""From a failing rule to its cause in Chromium: the version page's failing
night-pedestrian rule, one click to the images behind it (already filtered), one more
to an image's boxes drawn over its frame; keyboard to the next image."""

import pytest

from ..platform import cause_scenario
from .conftest import BROWSER_MARKS, shot

pytestmark = BROWSER_MARKS


@pytest.fixture
def story(users, team, run_tasks, settings):
    settings.BENCHBOOK_BOOTSTRAP_RESAMPLES = 200
    return cause_scenario.build(users, team, run_tasks)


def test_from_the_failing_rule_to_the_boxes(page, live_server, story):
    version = story["1.5"]
    page.goto(f"{live_server.url}/versions/{version.pk}/")
    assert page.locator("#verdict-state").inner_text() == "regression"
    link = page.locator("#outcomes a.cause-link").first
    assert "pedestrian" in link.locator("xpath=ancestor::tr").inner_text()
    link.click()

    # The list, filtered to the rule's split, class and tag, the largest loss first.
    page.wait_for_selector("#image-rows")
    assert page.locator("select[name=class]").input_value() == "pedestrian"
    assert page.locator("select[name=tag]").input_value() == "night"
    assert page.locator("select[name=against] option:checked").inner_text() == "1.4"
    rows = page.locator("#image-rows tbody tr")
    assert rows.count() > 5
    deltas = [
        float(t.replace("−", "-"))
        for t in page.locator("#image-rows tbody td:nth-child(3)").all_inner_texts()
    ]
    assert deltas == sorted(deltas) and deltas[0] < 0  # the largest loss first
    # Above the list: both versions' AP of the rule's class and the kind of error that
    # grew most for it (what the Done-when asks to see).
    assert page.locator("#list-kinds tr.grew th").inner_text().startswith("missed")
    assert "1.4" in page.locator("#list-ap").inner_text()
    shot(page, "cause-image-list-1280")
    page.set_viewport_size({"width": 390, "height": 844})
    shot(page, "cause-image-list-390")
    page.set_viewport_size({"width": 1280, "height": 900})

    first = rows.first.locator("a")
    image_id = first.inner_text()
    first.click()
    page.wait_for_selector("#frame-candidate g.boxes rect")
    assert image_id in page.locator("h1").inner_text()
    drawn = page.evaluate(
        """() => ({
          gt: document.querySelectorAll('#frame-candidate rect.gt').length,
          det: document.querySelectorAll('#frame-candidate rect.det').length,
          refDet: document.querySelectorAll('#frame-reference rect.det').length,
          lost: document.querySelectorAll('#frame-candidate rect.gt-lost').length,
          counts: window.benchbookDrilldown.counts,
        })"""
    )
    assert drawn["gt"] > 0 and drawn["det"] + drawn["refDet"] > 0
    # The worst image of a pedestrian loss: 1.5 missed a box 1.4 found, listed in words.
    assert drawn["lost"] >= 1 and drawn["counts"]["candidate"]["lost"] == drawn["lost"]
    assert page.locator("#lost-rows tr").count() >= 1
    lost = page.locator("#lost-rows tr").first.locator("td").all_inner_texts()
    assert lost[0].isdigit() and lost[3].startswith("missed") and lost[4].startswith("found")
    # Filtered to pedestrians, only pedestrians are drawn; the toggles and the slider
    # redraw.
    shown = page.evaluate(
        "() => [...document.querySelectorAll('#frame-candidate title')].map(t => t.textContent)"
    )
    assert shown and all(t.startswith("pedestrian") for t in shown)
    shot(page, "cause-drilldown-1280")
    page.set_viewport_size({"width": 390, "height": 844})
    shot(page, "cause-drilldown-390")
    page.set_viewport_size({"width": 1280, "height": 900})
    # Hovering a box names its class, score, outcome and IoU.
    page.locator("#frame-reference rect.det-tp").first.hover()
    assert "IoU" in page.locator("#hover-label").inner_text()
    page.locator("#threshold").fill("0.99")
    after = page.evaluate("() => document.querySelectorAll('#frame-candidate rect.det').length")
    assert after <= drawn["det"]
    pedestrian = page.locator("[data-class-toggle]").nth(3)
    pedestrian.uncheck()
    assert (
        page.evaluate("() => document.querySelectorAll('#frame-candidate g.boxes rect').length")
        == 0
    )
    pedestrian.check()
    # Keyboard: the next image of the same filtered list.
    before = page.url
    page.locator("h1").click()  # arrows on the slider move the slider; elsewhere, images
    page.keyboard.press("ArrowRight")
    page.wait_for_url(lambda url: url != before)
    assert "class=pedestrian" in page.url and "tag=night" in page.url
    page.wait_for_selector("#frame-candidate g.boxes rect")


def test_compare_page_confusion_side_by_side(page, live_server, story):
    """Both versions' matrices next to each other at 1280 px, one above the other at
    390 px without widening the page; a count opens that version's cell members."""
    from .conftest import ARTIFACTS

    split = story["split"]
    query = f"?candidate={story['1.5'].pk}&reference={story['1.4'].pk}"
    page.goto(f"{live_server.url}/detectors/{story['detector'].pk}/compare/{query}")
    section = page.locator(f"#confusion-{split.pk}")
    reference = page.locator(f"#confusion-{split.pk}-{story['1.4'].pk}")
    candidate = page.locator(f"#confusion-{split.pk}-{story['1.5'].pk}")
    ARTIFACTS.mkdir(exist_ok=True)
    section.screenshot(path=str(ARTIFACTS / "compare-confusion-1280.png"))
    sides = section.locator(".confusion-side")
    left, right = sides.nth(0).bounding_box(), sides.nth(1).bounding_box()
    assert left["x"] + left["width"] <= right["x"] and abs(left["y"] - right["y"]) < 2
    for table, box in ((reference, left), (candidate, right)):  # whole, no scrolling
        assert table.bounding_box()["width"] <= box["width"] + 1
    page.set_viewport_size({"width": 390, "height": 844})
    top, below = sides.nth(0).bounding_box(), sides.nth(1).bounding_box()
    assert below["y"] >= top["y"] + top["height"]
    assert page.evaluate("document.documentElement.scrollWidth") <= 390
    section.screenshot(path=str(ARTIFACTS / "compare-confusion-390.png"))
    page.set_viewport_size({"width": 1280, "height": 900})
    cell = candidate.locator("td.diag a").first
    count = int(cell.inner_text())
    cell.click()
    page.wait_for_selector("#cell")
    assert page.locator("#cell-title .meta").inner_text() == str(count)
    assert "1.5" in page.locator("h1").inner_text()
