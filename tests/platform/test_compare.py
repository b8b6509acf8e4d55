# ruff: noqa: F811  (fixtures imported from test_criteria are parameters here)
"""The compare page marks a delta only when its paired-bootstrap interval excludes zero;
intervals missing for a pair are computed in the background on request."""

import re

import pytest

from releases import comparisons, criteria, delta_intervals, judging, services
from releases import tasks as release_tasks
from releases.models import ComparisonInterval, Outcome

from .conftest import CLASSES, in_process, upload
from .test_criteria import _jitter, _lose, big_split, with_baseline  # noqa: F401

pytestmark = pytest.mark.django_db


@pytest.fixture
def compute_here(monkeypatch):
    monkeypatch.setattr(release_tasks.compare, "delay", in_process(release_tasks.compare))


def _candidate(detector, big_split, users, run_tasks, label, detections):
    split, _, _ = big_split
    version = services.create_version(detector, label, users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload(f"{label}.json", detections),
        users["engineer"],
    )
    return version


def _rows(html, split):
    """{class: (row css class, row text)} of the per-class delta table."""
    table = re.search(rf'<table class="deltas" id="deltas-{split.pk}">(.*?)</table>', html, re.S)
    rows = {}
    for css, body in re.findall(r'<tr class="([^"]*)">(.*?)</tr>', table.group(1), re.S):
        name = re.search(r"<td>([^<]*)</td>", body).group(1)
        rows[name] = (css, re.sub(r"<[^>]+>", " ", body))
    return rows


def test_significance_reads_only_the_interval():
    """Percentile-interval test of a paired bootstrap (common practice): zero outside
    the interval is significant, inside it is not; no interval, no mark."""
    from releases.selectors import significance

    assert significance(-0.05, [-0.08, -0.01]) == "regression"
    assert significance(0.04, [0.01, 0.07]) == "gain"
    assert significance(-0.05, [-0.09, 0.002]) == "not significant"
    assert significance(-0.05, None) is None
    assert significance(None, [-0.1, -0.05]) is None


def test_no_delta_is_marked_until_intervals_exist_then_only_real_drops(
    client,
    detector,
    big_split,
    users,
    run_tasks,
    with_baseline,
    compute_here,
):
    split, _, detections = big_split
    pedestrian = CLASSES.index("pedestrian") + 1
    candidate = _candidate(
        detector, big_split, users, run_tasks, "1.5", _lose(detections, pedestrian, 0.6, seed=1)
    )
    client.force_login(users["reviewer"])
    url = f"/detectors/{detector.pk}/compare/?reference={with_baseline.pk}&candidate={candidate.pk}"
    before = client.get(url).content.decode()
    rows = _rows(before, split)
    assert rows["pedestrian"][0] == "sig-none" and "no interval" in rows["pedestrian"][1]
    assert "sig-regression" not in before and "Compute intervals" in before

    answer = run_tasks(
        client.post,
        f"/detectors/{detector.pk}/compare/intervals/",
        {"reference": with_baseline.pk, "candidate": candidate.pk},
    )
    assert answer.status_code == 302 and answer.url.endswith(url.split("?")[1])
    row = ComparisonInterval.objects.get()
    assert row.state == "done" and row.requested_by == users["reviewer"]
    after = client.get(url)
    rows = _rows(after.content.decode(), split)
    assert rows["pedestrian"][0] == "sig-regression" and "regression" in rows["pedestrian"][1]
    assert "Compute intervals" not in after.content.decode()
    for d in after.context["splits"][0]["deltas"]:
        low, high, confidence = d["interval"]
        assert confidence == 0.95
        expected = "regression" if high < 0 else "gain" if low > 0 else "not significant"
        assert d["significance"] == expected and rows[d["class"]][0] == f"sig-{expected}".replace(
            " ", "-"
        )
    # The tag matrix is marked by its own intervals (the split's only tag: night).
    assert set(row.intervals) == {"", "night"}

    # The judge's bootstrap on the same pair gives the same bounds (same helper, seed, B).
    criteria.set_criteria(detector, users["lead"], [{"kind": "no_significant_drop", "class": "*"}])
    judging.judge(candidate.pk)
    for o in Outcome.objects.filter(version=candidate):
        low, high = row.intervals[""][o.class_name]
        assert low == pytest.approx(o.low, abs=1e-6) and high == pytest.approx(o.high, abs=1e-6)


def test_a_small_drop_holding_zero_reads_not_significant(
    client,
    detector,
    big_split,
    users,
    run_tasks,
    with_baseline,
    compute_here,
):
    split, _, detections = big_split
    candidate = _candidate(detector, big_split, users, run_tasks, "1.5", _jitter(detections, 4))
    run_tasks(comparisons.request_intervals, with_baseline, candidate, users["engineer"])
    client.force_login(users["engineer"])
    response = client.get(
        f"/detectors/{detector.pk}/compare/?reference={with_baseline.pk}&candidate={candidate.pk}"
    )
    deltas = response.context["splits"][0]["deltas"]
    dropped = [d for d in deltas if d["delta"] < 0]
    assert dropped, "the jittered candidate must lose a little somewhere"
    rows = _rows(response.content.decode(), split)
    for d in dropped:
        assert d["significance"] == "not significant"
        assert rows[d["class"]][0] == "sig-not-significant"


def test_requests_are_idempotent_scoped_and_retried_after_a_failure(
    client,
    detector,
    big_split,
    users,
    run_tasks,
    with_baseline,
    monkeypatch,
    rival_detector,
):
    split, _, detections = big_split
    candidate = _candidate(detector, big_split, users, run_tasks, "1.5", _jitter(detections, 4))
    sent = []
    monkeypatch.setattr(release_tasks.compare, "delay", lambda pk: sent.append(pk))
    with pytest.raises(services.UploadError, match="choose two different versions"):
        comparisons.request_intervals(candidate, candidate, users["lead"])
    client.force_login(users["engineer"])
    url = f"/detectors/{detector.pk}/compare/intervals/"
    pair = {"reference": with_baseline.pk, "candidate": candidate.pk}
    run_tasks(client.post, url, pair)
    run_tasks(client.post, url, pair)  # a second click while queued queues nothing
    assert ComparisonInterval.objects.count() == 1 and len(sent) == 1
    page = client.get(
        f"/detectors/{detector.pk}/compare/?reference={with_baseline.pk}&candidate={candidate.pk}"
    )
    assert "being computed" in page.content.decode()

    # Another team's member cannot see the detector: 404, nothing queued.
    client.force_login(users["rival"])
    assert client.post(url, pair).status_code == 404
    # A version of another detector is not a version of this one.
    client.force_login(users["lead"])
    other = services.create_version(rival_detector, "9.9", users["rival"])
    assert client.post(url, {**pair, "candidate": other.pk}).status_code == 404

    # The computation fails (its records are unreadable): the page says so and offers it again.
    def broken(*args):
        raise OSError("records file missing")

    monkeypatch.setattr(delta_intervals, "_intervals", broken)
    comparisons.compute(sent[0])
    page = client.get(
        f"/detectors/{detector.pk}/compare/?reference={with_baseline.pk}&candidate={candidate.pk}"
    )
    html = page.content.decode()
    assert "Computing the intervals failed: OSError: records file missing" in html
    assert "Compute intervals" in html
    monkeypatch.undo()
    monkeypatch.setattr(release_tasks.compare, "delay", in_process(release_tasks.compare))
    run_tasks(client.post, url, pair)
    assert ComparisonInterval.objects.get().state == "done"


def test_another_teams_identical_files_do_not_reuse_or_reveal_intervals(
    client,
    detector,
    rival_detector,
    big_split,
    users,
    run_tasks,
    with_baseline,
    compute_here,
):
    """Issue 12 item 7 (no cross-team leak): intervals are kept per team. Team B
    comparing versions whose files are byte-identical to team A's pair sees no interval
    (and no "computed by"), and its own request computes a row of its own."""
    split, _, detections = big_split
    pedestrian = CLASSES.index("pedestrian") + 1
    lost = _lose(detections, pedestrian, 0.6, seed=1)
    candidate = _candidate(detector, big_split, users, run_tasks, "1.5", lost)
    comparisons.request_intervals(with_baseline, candidate, users["reviewer"])
    assert ComparisonInterval.objects.get().team_id == detector.team_id

    rival_versions = []
    for label, data in (("r1", detections), ("r2", lost)):
        version = services.create_version(rival_detector, label, users["rival"])
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload(f"{label}.json", data),
            users["rival"],
        )
        rival_versions.append(version)
    reference, rival_candidate = rival_versions
    assert rival_candidate.prediction_sets.get().predictions_id == (
        candidate.prediction_sets.get().predictions_id
    )
    client.force_login(users["rival"])
    url = (
        f"/detectors/{rival_detector.pk}/compare/"
        f"?reference={reference.pk}&candidate={rival_candidate.pk}"
    )
    html = client.get(url).content.decode()
    assert "Compute intervals" in html and "sig-regression" not in html
    assert "reviewer" not in html
    queued = comparisons.request_intervals(reference, rival_candidate, users["rival"])
    assert len(queued) == 1 and queued[0].team_id == rival_detector.team_id
    assert ComparisonInterval.objects.count() == 2
