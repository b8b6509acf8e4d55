"""The split page's image form in Chromium: a lead sees it and attaches a URL template;
an engineer (who may load splits) sees no form. Screenshots at 1280 and 390 px."""

from ..platform.conftest import split_dict, upload
from .conftest import BROWSER_MARKS, shot, signed_in

pytestmark = BROWSER_MARKS


def test_only_a_lead_is_offered_the_image_form(page, browser, live_server, users, team):
    from evaluation import services as evaluation_services

    truth = split_dict(seed=21, n_images=4)
    for n, image in enumerate(truth["images"]):
        image["file_name"] = f"cam/{n:04d}.png"
    split = evaluation_services.load_split(
        name="harbour-cam", revision=1, truth=upload("harbour-cam.json", truth)
    )
    url = f"{live_server.url}/splits/{split.pk}/"
    engineer = signed_in(browser, live_server, "engineer")
    engineer.goto(url)
    assert engineer.locator("#split-images").is_visible()
    assert engineer.locator("form.images-form").count() == 0
    shot(engineer, "split-images-engineer-1280")
    engineer.context.close()

    page.goto(url)
    form = page.locator("form.images-form")
    assert form.is_visible()
    shot(page, "split-images-lead-1280")
    page.set_viewport_size({"width": 390, "height": 844})
    shot(page, "split-images-lead-390")
    page.set_viewport_size({"width": 1280, "height": 900})
    page.fill("#images-url", "https://images.example/{file_name}")
    page.click("form.images-form button[type=submit]")
    page.wait_for_selector("#images-source")
    assert "https://images.example/{file_name}" in page.locator("#images-source").inner_text()
