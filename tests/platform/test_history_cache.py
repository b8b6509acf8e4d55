"""The history numbers are kept per process under the detector's change stamp
(``releases.history_stamps``): a cached read equals a fresh one, and every change to
what the chart reads reaches the next read, whichever entry point made it (upload,
replacement of a failed upload, re-score, an evaluation finishing in the worker's code,
a suite's new protocol), read through the selector, the page or the API, and in each
order of a change and a read (before the stamp, between stamp and numbers, after the
numbers). Expected values are the stored scorecards' own rows (``_stored``), which
tests/engine checks against pycocotools."""

import copy

import pytest
from django.db import connection, transaction
from django.test.utils import CaptureQueriesContext
from django.urls import reverse
from rest_framework.test import APIClient

from evaluation import services as evaluation_services
from evaluation.models import Evaluation
from releases import history_stamps, rescore, selectors, services, tokens
from releases.selectors import history

from .conftest import detections_for, upload
from .test_history import _stored

pytestmark = pytest.mark.django_db
API = "/api/v1/"


def _upload(version, split, truth, users, run_tasks, seed):
    return run_tasks(
        services.submit_predictions,
        version,
        split,
        upload(f"{version.label}-{seed}.json", detections_for(truth, seed=seed)),
        users["engineer"],
    )


def _point(chart, version, name="bay-night"):
    at = [v["id"] for v in chart["versions"]].index(version.pk)
    line = next(line for line in chart["series"] if line["name"] == name)
    return line["values"][at]


@pytest.fixture
def scored(detector, split, split_truth, users, run_tasks):
    version = services.create_version(detector, "1.0", users["engineer"])
    _upload(version, split, split_truth, users, run_tasks, seed=3)
    return version


def test_a_cached_read_equals_a_fresh_one_and_skips_the_join(detector, split, scored):
    first = selectors.history_chart(detector, metric="AP50")
    with CaptureQueriesContext(connection) as queries:
        again = selectors.history_chart(detector, metric="AP50")
    assert again == first
    assert not any("evaluation_classscore" in q["sql"] for q in queries.captured_queries)
    history_stamps.clear()
    assert selectors.history_chart(detector, metric="AP50") == first
    assert _point(first, scored) == _stored(scored, split, field="ap50")


def test_a_new_upload_reaches_the_page_and_the_api(
    detector, split, split_truth, scored, users, run_tasks, client
):
    client.force_login(users["engineer"])
    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(users['engineer'], 't')[1]}")
    url = f"{API}detectors/{detector.pk}/history/"
    assert len(api.get(url).json()["versions"]) == 1
    client.get(reverse("detector", args=[detector.pk]))  # both cached now
    newer = services.create_version(detector, "1.1", users["engineer"])
    _upload(newer, split, split_truth, users, run_tasks, seed=4)
    expected = _stored(newer, split)
    assert _point(api.get(url).json(), newer) == expected
    page = client.get(reverse("detector", args=[detector.pk]))
    assert _point(page.context["chart"], newer) == expected


def test_an_evaluation_finishing_later_reaches_the_next_read(
    detector, split, split_truth, users, monkeypatch
):
    """Uploaded while no worker runs: no point; the worker's own code finishes it (the
    result's transaction records the change): the point appears."""
    from evaluation import tasks

    monkeypatch.setattr(tasks.score, "delay", lambda *args: None)
    version = services.create_version(detector, "1.0", users["engineer"])
    with transaction.atomic():
        services.submit_predictions(
            version, split, upload("p.json", detections_for(split_truth, seed=5)), users["engineer"]
        )
    assert _point(selectors.history_chart(detector), version) is None
    for pk in Evaluation.objects.filter(state="queued").values_list("pk", flat=True):
        evaluation_services.run_evaluation(pk)
    assert _point(selectors.history_chart(detector), version) == _stored(version, split)


def test_a_replaced_failed_upload_reaches_the_next_read(
    detector, split, split_truth, users, run_tasks, settings
):
    version = services.create_version(detector, "1.0", users["engineer"])
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0  # the worker finds the bad image id
    bad = '[{"image_id": 999999, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5}]'
    run_tasks(services.submit_predictions, version, split, upload("bad.json", bad), users["lead"])
    assert _point(selectors.history_chart(detector), version) is None
    _upload(version, split, split_truth, users, run_tasks, seed=6)
    assert _point(selectors.history_chart(detector), version) == _stored(version, split)


def test_a_rescore_reaches_the_next_read(detector, split, split_truth, scored, users, run_tasks):
    truth = copy.deepcopy(split_truth)
    truth["annotations"] = truth["annotations"][::2]
    relabelled = evaluation_services.load_split(
        name=split.name, revision=2, truth=upload("r2.json", truth)
    )
    before = selectors.history_chart(detector, revisions="separate")
    assert [line["name"] for line in before["series"]] == [str(split)]
    run_tasks(rescore.rescore, detector, users["lead"], relabelled)
    after = selectors.history_chart(detector, revisions="separate")
    assert _point(after, scored, name=str(relabelled)) == _stored(scored, relabelled)
    joined = selectors.history_chart(detector)
    assert joined["series"][0]["revisions"][0] == 2


def test_a_change_between_the_stamp_and_the_numbers_is_read_again_later(
    detector, split, split_truth, scored, users, run_tasks, monkeypatch
):
    """The two orderings of a change and a read that could leave an entry behind: a
    change committed after the stamp was read (while the numbers are read, or after
    them, before they are kept). Either way the next read has a new stamp and reads
    the numbers again."""
    newer = services.create_version(detector, "1.1", users["engineer"])
    real = history._numbers
    for when in ("before the numbers", "after the numbers"):
        history_stamps.clear()
        label = f"1.{2 if when == 'before the numbers' else 3}"
        target = services.create_version(detector, label, users["engineer"])

        def change_then_read(*args, when=when, target=target):
            if when == "before the numbers":
                _upload(target, split, split_truth, users, run_tasks, seed=8)
                return real(*args)
            numbers = real(*args)
            _upload(target, split, split_truth, users, run_tasks, seed=9)
            return numbers

        monkeypatch.setattr(history, "_numbers", change_then_read)
        selectors.history_chart(detector)
        monkeypatch.setattr(history, "_numbers", real)
        assert _point(selectors.history_chart(detector), target) == _stored(target, split), when
    assert _point(selectors.history_chart(detector), newer) is None


def test_a_rolled_back_change_leaves_the_stamp(detector, scored):
    before = history_stamps.stamp(detector.pk)
    with pytest.raises(RuntimeError), transaction.atomic():
        history_stamps.changed([detector.pk])
        raise RuntimeError
    assert history_stamps.stamp(detector.pk) == before
    history_stamps.changed([detector.pk])
    assert history_stamps.stamp(detector.pk)[0] == before[0] + 1


def test_identical_bytes_linked_to_a_scored_evaluation_reach_the_next_read(
    detector, split, split_truth, scored, users, run_tasks
):
    """Another version of the team uploads the very bytes already scored: its set is
    linked to the finished evaluation, nothing is scored, and its point still appears."""
    assert len(selectors.history_chart(detector)["versions"]) == 1
    twin = services.create_version(detector, "1.0-rebuild", users["engineer"])
    finished = Evaluation.objects.filter(state="done").count()
    _upload(twin, split, split_truth, users, run_tasks, seed=3)
    assert Evaluation.objects.filter(state="done").count() == finished  # nothing scored
    chart = selectors.history_chart(detector)
    assert _point(chart, twin) == _point(chart, scored) == _stored(scored, split)
