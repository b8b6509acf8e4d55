"""The compare page in Chromium: a drop whose interval holds zero carries no regression mark."""

import copy

import numpy as np
import pytest

from evaluation import services as evaluation_services
from releases import services
from releases import tasks as release_tasks

from ..engine.synthetic import make_detections, make_split
from ..platform.conftest import CLASSES, in_process, upload
from .conftest import BROWSER_MARKS, shot

pytestmark = BROWSER_MARKS


@pytest.fixture
def noisy_pair(detector, users, run_tasks, team, split):
    """A baseline and a candidate that differs only by score noise (a drop that is noise)."""
    rng = np.random.default_rng(77)
    truth = make_split(
        rng, n_images=60, n_classes=3, boxes_per_image=6, crowd_rate=0.0, tags=("night",)
    )
    for category, name in zip(truth["categories"], CLASSES):
        category["name"] = name
    detections = make_detections(rng, truth, hit_rate=0.9, false_per_image=1, duplicate_rate=0.05)
    loaded = evaluation_services.load_split(
        name="bay-night", revision=3, truth=upload("b.json", truth)
    )
    jittered = copy.deepcopy(detections)
    noise = np.random.default_rng(4)
    for d in jittered:
        d["score"] = float(np.clip(d["score"] + noise.normal(0, 0.02), 0, 1))
    versions = []
    for label, predictions in (("1.4", detections), ("1.5", jittered)):
        version = services.create_version(detector, label, users["engineer"])
        run_tasks(
            services.submit_predictions,
            version,
            loaded,
            upload(f"{label}.json", predictions),
            users["engineer"],
        )
        versions.append(version)
    return loaded, versions


def test_a_noisy_drop_shows_without_the_regression_mark(
    page, live_server, detector, noisy_pair, monkeypatch
):
    monkeypatch.setattr(release_tasks.compare, "delay", in_process(release_tasks.compare))
    split, (baseline, candidate) = noisy_pair
    page.goto(
        f"{live_server.url}/detectors/{detector.pk}/compare/"
        f"?reference={baseline.pk}&candidate={candidate.pk}"
    )
    page.click(f"#intervals-{split.pk} button[type=submit]")
    page.wait_for_selector(f"#deltas-{split.pk} tr.sig-not-significant")
    rows = page.evaluate(
        f"""[...document.querySelectorAll('#deltas-{split.pk} tbody tr')].map(tr => {{
            const cell = tr.querySelector('td.delta');
            const style = getComputedStyle(cell);
            return {{
                css: tr.className,
                delta: parseFloat(cell.textContent.replace('−', '-')),
                reading: tr.querySelector('td.reading').textContent.trim(),
                mark: getComputedStyle(cell, '::after').content,
                weight: style.fontWeight,
                colour: style.color,
            }};
        }})"""
    )
    dropped = [r for r in rows if r["delta"] < 0]
    assert dropped, rows
    for row in dropped:
        assert row["css"] == "sig-not-significant", row
        assert row["reading"] == "not significant", row
        assert "▼" not in row["mark"] and row["weight"] != "700", row
        assert row["colour"] != "rgb(155, 28, 49)", row  # --bad, the regression colour
    shot(page, "compare-not-significant")
    page.set_viewport_size({"width": 390, "height": 800})
    shot(page, "compare-not-significant-390")
