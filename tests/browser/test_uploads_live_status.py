"""The version page's live status in Chromium (issue 10 item 6): a failed evaluation
shows its message as soon as it fails, without a reload; when scoring finishes the page
loads the numbers by itself."""

import uuid

from playwright.sync_api import expect

from evaluation import services as evaluation_services
from evaluation import tasks
from evaluation.models import Evaluation, Scorecard
from releases import services

from ..platform.conftest import detections_for, split_dict, upload
from .conftest import BROWSER_MARKS, shot

pytestmark = BROWSER_MARKS

BAD = '[{"image_id": 999999, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5}]'


def _score(prediction_set):
    for evaluation in Evaluation.objects.filter(
        predictions=prediction_set.predictions, split=prediction_set.split
    ):
        tasks.score.apply(args=[evaluation.pk], task_id=str(uuid.uuid4()), throw=True)


def test_a_failure_shows_at_once_and_the_numbers_load_when_scoring_ends(
    page, live_server, detector, split, split_truth, users, run_tasks, monkeypatch, settings
):
    ring = evaluation_services.load_split(
        name="ring-road", revision=1, truth=upload("ring.json", split_dict(seed=21))
    )
    version = services.create_version(detector, "3.0", users["engineer"])
    with monkeypatch.context() as held:  # the jobs wait until the page is open
        held.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
        good = services.submit_predictions(
            version, split, upload("good.json", detections_for(split_truth)), users["engineer"]
        )
        settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0  # the worker finds the bad file
        bad = services.submit_predictions(version, ring, upload("bad.json", BAD), users["engineer"])
    page.goto(f"{live_server.url}/versions/{version.pk}/")
    assert page.locator("progress[data-poll]").count() == 4  # 2 splits x coco, voc
    assert page.locator("dl.summary").count() == 0

    _score(bad)
    alert = page.locator("[role=alert]", has_text="image 999999 is not in the split")
    # one per protocol (each row polls on its own, so the second may show a poll later),
    # while the others still wait
    expect(alert).to_have_count(2, timeout=15_000)
    expect(page.locator("progress[data-poll]")).to_have_count(2)
    assert page.locator("dl.summary").count() == 0  # not reloaded yet
    shot(page, "live-status-failed")

    _score(good)
    page.locator("dl.summary").first.wait_for(timeout=20_000)  # the page loaded again
    ap = Scorecard.objects.get(evaluation__predictions=good.predictions, protocol="coco")
    summary = page.locator("dl.summary").first.inner_text()
    assert f"{ap.summary['AP']:.3f}" in summary
    assert page.locator("progress[data-poll]").count() == 0
    assert page.get_by_text("image 999999 is not in the split").count() >= 1  # still shown
    shot(page, "live-status-scored")
