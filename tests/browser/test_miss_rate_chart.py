"""The miss-rate-versus-FPPI chart in Chromium: log-log axes, one line per version
(two overlaid on the compare page), the setup and class pickers redraw it, and it fits
at 1280 and 390 px (screenshots in test-artifacts/)."""

import numpy as np
import pytest

from evaluation import services as evaluation_services
from releases import services

from ..platform.conftest import CLASSES, upload
from ..platform.test_miss_rate_chart import store_miss_rate
from .conftest import ARTIFACTS, BROWSER_MARKS, shot

pytestmark = BROWSER_MARKS


def _street(rng, n_images=80):
    """Invented street scenes: pedestrians 25-220 px tall (aspect 0.41), visibility
    0.1-1, a few cars, one don't-care region every fifth image."""
    images, annotations, regions = [], [], []
    for i in range(1, n_images + 1):
        images.append({"id": i, "width": 1280, "height": 720})
        for _ in range(int(rng.integers(1, 6))):
            h = float(rng.uniform(25, 220))
            annotations.append(
                {
                    "id": len(annotations) + 1,
                    "image_id": i,
                    "category_id": 2,
                    "bbox": [float(rng.uniform(0, 1180)), float(rng.uniform(0, 500)), 0.41 * h, h],
                    "visibility": round(float(rng.uniform(0.1, 1.0)), 2),
                }
            )
        annotations.append(
            {
                "id": len(annotations) + 1,
                "image_id": i,
                "category_id": 1,
                "bbox": [float(rng.uniform(0, 1000)), 400.0, 200.0, 120.0],
            }
        )
        if i % 5 == 0:
            regions.append({"image_id": i, "bbox": [1000.0, 0.0, 280.0, 300.0]})
    categories = [{"id": k + 1, "name": name} for k, name in enumerate(CLASSES)]
    return {
        "images": images,
        "annotations": annotations,
        "categories": categories,
        "dont_care": regions,
    }


def _detector_output(rng, truth, hit_rate, false_per_image):
    out = []
    for a in truth["annotations"]:
        if rng.random() < hit_rate:
            x, y, w, h = a["bbox"]
            out.append(
                {
                    "image_id": a["image_id"],
                    "category_id": a["category_id"],
                    "bbox": [x + float(rng.normal(0, 2)), y + float(rng.normal(0, 2)), w, h],
                    "score": float(rng.uniform(0.3, 1.0)),
                }
            )
    for image in truth["images"]:
        for _ in range(int(rng.poisson(false_per_image))):
            h = float(rng.uniform(30, 200))
            out.append(
                {
                    "image_id": image["id"],
                    "category_id": 2,
                    "bbox": [float(rng.uniform(0, 1180)), float(rng.uniform(0, 500)), 0.41 * h, h],
                    "score": float(rng.uniform(0.0, 0.8)),
                }
            )
    return out


@pytest.fixture
def street_versions(detector, users, run_tasks, tmp_path):
    rng = np.random.default_rng(14)
    truth = _street(rng)
    split = evaluation_services.load_split(
        name="kerbside", revision=1, truth=upload("k.json", truth)
    )
    versions = []
    for label, hit, fpi in (("1.4", 0.85, 1.5), ("1.5", 0.7, 2.5)):
        version = services.create_version(detector, label, users["engineer"])
        detections = _detector_output(rng, truth, hit, fpi)
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload(f"{label}.json", detections),
            users["engineer"],
        )
        folder = tmp_path / label
        folder.mkdir()
        store_miss_rate(version.prediction_sets.current().get(), truth, detections, folder)
        versions.append(version)
    detector.protocols = ["coco", "miss-rate"]
    detector.save(update_fields=["protocols"])
    return split, versions


def _chart(page, key):
    return page.evaluate(
        f"""(() => {{
            const c = window.benchbookCharts['missrate-{key}'];
            return {{
                labels: c.data.datasets.map(d => d.label),
                points: c.data.datasets.map(d => d.data.length),
                x: c.options.scales.x.type, y: c.options.scales.y.type,
                width: c.canvas.getBoundingClientRect().width,
            }};
        }})()"""
    )


def test_version_and_compare_pages_draw_the_log_log_chart(
    page, live_server, detector, street_versions
):
    split, (reference, candidate) = street_versions
    key = f"{split.pk}-0"
    page.goto(f"{live_server.url}/versions/{reference.pk}/")
    chart = _chart(page, key)
    assert chart["x"] == chart["y"] == "logarithmic"
    assert len(chart["labels"]) == 1 and chart["labels"][0].startswith(
        "1.4: log-average miss rate 0."
    )
    assert chart["points"][0] > 5
    page.locator(f"#missrate-{key}").scroll_into_view_if_needed()
    shot(page, "miss-rate-version-1280")
    # one table of the setups' numbers on the version page (the per-setup table)
    assert page.locator(f"#levels-miss-rate-{split.pk}").is_visible()
    assert page.locator(f"#missrate-table-{key}").count() == 0
    page.set_viewport_size({"width": 390, "height": 800})
    page.locator(f"#levels-miss-rate-{split.pk}").scroll_into_view_if_needed()
    shot(page, "miss-rate-version-390")
    page.set_viewport_size({"width": 1280, "height": 900})

    page.goto(
        f"{live_server.url}/detectors/{detector.pk}/compare/"
        f"?reference={reference.pk}&candidate={candidate.pk}"
    )
    chart = _chart(page, key)
    assert [label.split(":")[0] for label in chart["labels"]] == [
        "1.4 (reference)",
        "1.5 (candidate)",
    ]
    before = chart["labels"]
    page.select_option(f"#missrate-setup-{key}", "heavy")
    after = _chart(page, key)["labels"]
    assert after != before  # the heavy-occlusion setup's own log-average miss rates
    page.select_option(f"#missrate-class-{key}", "car")
    assert _chart(page, key)["labels"] != after  # the cars' own curves
    page.select_option(f"#missrate-class-{key}", "pedestrian")
    page.select_option(f"#missrate-setup-{key}", "reasonable")
    page.locator(f"#missrate-{key}").scroll_into_view_if_needed()
    shot(page, "miss-rate-compare-1280")

    page.set_viewport_size({"width": 390, "height": 844})
    page.reload()
    chart = _chart(page, key)
    assert chart["width"] <= 390
    assert page.evaluate("document.documentElement.scrollWidth") <= 390
    page.locator(f"#missrate-{key}").scroll_into_view_if_needed()
    page.screenshot(path=str(ARTIFACTS / "miss-rate-compare-390-chart.png"))
    shot(page, "miss-rate-compare-390")
