# ruff: noqa: F811  (the scene fixture imported from test_slice_rules is a parameter here)
"""The compare page's size deltas: per size bucket and class, the AP change of the
ground truth and detections in that area range — equal to the reference
implementation's, pycocotools 2.0.11 (``eval['precision'][..., k, areaRng, maxDets=100]``)
— marked only by an interval of that bucket (computed on request, or from a size
rule's judgement); a size rule's interval never marks the whole-split delta."""

import json
import re

import pytest

from releases import criteria, services
from releases import tasks as release_tasks
from releases.models import ComparisonInterval, Outcome

from ..engine.conftest import pycocotools_eval
from .conftest import CLASSES, in_process
from .test_slice_rules import _lose_small, _score, scene  # noqa: F401

pytestmark = pytest.mark.django_db
SIZES = ("small", "medium", "large")


def _size_cells(html, split):
    """{(size, class): (css, delta text)} of the size matrix."""
    table = re.search(
        rf'<table class="deltas matrix" id="sizes-{split.pk}">(.*?)</table>', html, re.S
    )
    cells = {}
    for size, body in re.findall(r'<th scope="row">([^<]*)</th>(.*?)</tr>', table.group(1), re.S):
        found = re.findall(r'<td class="num delta sig-([^"]*)"[^>]*>([^<]*)</td>', body)
        for name, (css, text) in zip(["mean", *CLASSES], found):
            cells[(size, name)] = (css, text)
    return cells


def _pycocotools_ap(tmp_path, name, truth, detections):
    gt, dt = tmp_path / f"{name}-gt.json", tmp_path / f"{name}-dt.json"
    gt.write_text(json.dumps(truth))
    dt.write_text(json.dumps(detections))
    precision = pycocotools_eval(gt, dt).eval["precision"]
    return {
        (size, cls): float(precision[:, :, k, a, 2].mean())
        for a, size in enumerate(SIZES, start=1)
        for k, cls in enumerate(CLASSES)
    }


def test_size_deltas_equal_the_reference_and_are_marked_by_their_own_intervals(
    client, detector, scene, users, run_tasks, settings, monkeypatch, tmp_path
):
    settings.BENCHBOOK_BOOTSTRAP_RESAMPLES = 300
    monkeypatch.setattr(release_tasks.compare, "delay", in_process(release_tasks.compare))
    split, truth, detections = scene
    pedestrian = CLASSES.index("pedestrian") + 1
    lost = _lose_small(detections, truth, pedestrian, 0.8, 3)
    reference = _score(detector, scene, users, run_tasks, "1.0")
    services.sign_off(reference, users["lead"], "approved", "baseline")
    rule = {"kind": "no_significant_drop", "class": "pedestrian", "size": "small"}
    criteria.set_criteria(detector, users["lead"], [rule])
    candidate = _score(detector, scene, users, run_tasks, "1.1", lost)
    judged = Outcome.objects.get(version=candidate)
    assert judged.status == "fail"

    client.force_login(users["reviewer"])
    url = f"/detectors/{detector.pk}/compare/?reference={reference.pk}&candidate={candidate.pk}"
    page = client.get(url)
    entry = page.context["splits"][0]
    # The size rule's interval marks its own cell, never the whole-split pedestrian delta.
    whole = {d["class"]: d for d in entry["deltas"]}
    assert whole["pedestrian"]["interval"] is None
    by_size = {row["size"]: {c["class"]: c for c in row["cells"]} for row in entry["sizes"]}
    assert [row["size"] for row in entry["sizes"]] == list(SIZES)
    assert by_size["small"]["pedestrian"]["interval"][:2] == [judged.low, judged.high]
    assert by_size["small"]["pedestrian"]["significance"] == "regression"
    assert by_size["large"]["pedestrian"]["interval"] is None

    # The numbers are pycocotools' per area range.
    before = _pycocotools_ap(tmp_path, "ref", truth, detections)
    after = _pycocotools_ap(tmp_path, "cand", truth, lost)
    for size in SIZES:
        for cls in CLASSES:
            cell = by_size[size][cls]
            assert cell["reference"] == pytest.approx(before[(size, cls)], abs=1e-12)
            assert cell["candidate"] == pytest.approx(after[(size, cls)], abs=1e-12)
    cells = _size_cells(page.content.decode(), split)
    assert cells[("small", "pedestrian")][0] == "regression"
    assert cells[("large", "pedestrian")][0] == "none"

    run_tasks(
        client.post,
        f"/detectors/{detector.pk}/compare/intervals/",
        {"reference": reference.pk, "candidate": candidate.pk},
    )
    row = ComparisonInterval.objects.get()
    assert row.state == "done" and set(row.size_intervals) == set(SIZES)
    # Same helper, seed and B as the judge: the same bounds for the judged cell.
    low, high = row.size_intervals["small"]["pedestrian"]
    assert low == pytest.approx(judged.low, abs=1e-6) and high == pytest.approx(
        judged.high, abs=1e-6
    )
    entry = client.get(url).context["splits"][0]
    by_size = {r["size"]: {c["class"]: c for c in r["cells"]} for r in entry["sizes"]}
    # Nothing large was lost: the delta is 0 and its interval [0, 0] holds zero.
    assert by_size["large"]["pedestrian"]["delta"] == 0
    assert by_size["large"]["pedestrian"]["significance"] == "not significant"
    for size in SIZES:
        for name, cell in by_size[size].items():
            assert cell["interval"][:2] == row.size_intervals[size][name]
