"""Every page of a demo-like fixture at 1280 and 390 px: no table overflows its
container, none overlaps another element, and the page itself never scrolls sideways.

Measured in Chromium with getBoundingClientRect / scrollWidth; screenshots of each page
at both widths go to test-artifacts/layout-*.png.
"""

import datetime
import json

import pytest
from django.core.files.base import ContentFile
from django.utils import timezone

from evaluation import services as evaluation_services
from releases import criteria, demo, judging, services, suites

from .conftest import BROWSER_MARKS, shot, signed_in

pytestmark = BROWSER_MARKS

WIDTHS = {1280: 900, 390: 800}

# Returns one line per problem found on the page.
MEASURE = """() => {
  const problems = [];
  const name = el => el.tagName.toLowerCase() + (el.id ? '#' + el.id : '') +
    (el.className && typeof el.className === 'string' ? '.' + el.className.split(' ').join('.') : '');
  const width = document.documentElement.clientWidth;
  if (document.documentElement.scrollWidth > width + 1)
    problems.push(`page scrolls sideways: ${document.documentElement.scrollWidth} > ${width}`);
  const scroller = el => {
    for (let p = el.parentElement; p && p !== document.body; p = p.parentElement) {
      const o = getComputedStyle(p).overflowX;
      if (o === 'auto' || o === 'scroll') return p;
    }
    return null;
  };
  const visible = el => {
    const r = el.getBoundingClientRect();
    return r.width > 0 && r.height > 0 && (!el.checkVisibility || el.checkVisibility());
  };
  // What can be seen of an element: its box clipped by every ancestor that clips.
  const seen = el => {
    const r = el.getBoundingClientRect();
    let box = {left: r.left, right: r.right, top: r.top, bottom: r.bottom};
    for (let p = el.parentElement; p && p !== document.body; p = p.parentElement) {
      if (getComputedStyle(p).overflowX === 'visible') continue;
      const c = p.getBoundingClientRect();
      box = {left: Math.max(box.left, c.left), right: Math.min(box.right, c.right),
             top: Math.max(box.top, c.top), bottom: Math.min(box.bottom, c.bottom)};
    }
    return box;
  };
  const tables = [...document.querySelectorAll('main table')].filter(visible);
  const boxes = tables.map(t => {
    const s = scroller(t);
    const box = (s || t).getBoundingClientRect();
    if (s) {
      if (box.right > width + 1) problems.push(`${name(s)} holding ${name(t)} ends at ${box.right} > ${width}`);
    } else {
      const parent = t.parentElement.getBoundingClientRect();
      if (t.getBoundingClientRect().right > parent.right + 1)
        problems.push(`${name(t)} overflows ${name(t.parentElement)}: ${t.getBoundingClientRect().right} > ${parent.right}`);
    }
    return {el: s || t, table: t, box};
  });
  const others = [...document.querySelectorAll(
    'main h1, main h2, main h3, main p, main dl, main form, main canvas, main pre, main ul, main table'
  )].filter(visible);
  const overlap = (a, b) => Math.min(a.right, b.right) - Math.max(a.left, b.left) > 1 &&
                            Math.min(a.bottom, b.bottom) - Math.max(a.top, b.top) > 1;
  for (const {el, table, box} of boxes) {
    for (const other of others) {
      if (other === table || table.contains(other) || other.contains(table)) continue;
      if (overlap(seen(table), seen(other)))
        problems.push(`${name(table)} overlaps ${name(other)}`);
    }
  }
  return problems;
}"""


@pytest.fixture
def demo_like(detector, team, users, run_tasks, split):
    """The demo's classes and generators at a smaller scale: two splits with image tags,
    three versions (a baseline signed off in the past, two candidates), criteria twice."""
    from releases.models import Detector

    Detector.objects.filter(pk=detector.pk).update(classes=demo.CLASSES)
    detector.refresh_from_db()
    splits = []
    for name, seed, night in (("bay-day", 11, 0.0), ("ring-road", 14, 0.4)):
        truth = demo.split_truth(name, 1, seed, 40, (1280, 720), night, ("harbour",))
        loaded = evaluation_services.load_split(
            name=name,
            revision=1,
            truth=ContentFile(json.dumps(truth).encode(), name=f"{name}.json"),
        )
        splits.append((loaded, truth))
    # A suite with a custom protocol and a class threshold: the suite page lists both,
    # the version page's deployed-threshold table cuts there.
    suites.set_suite(
        detector,
        users["lead"],
        {
            "splits": ["bay-day", "ring-road"],
            "protocols": ["coco", {"name": "iou60", "base": "coco", "iou_thresholds": [0.6]}],
            "score_threshold": 0.5,
            "class_thresholds": {demo.CLASSES[1]: 0.4},
        },
    )
    start = timezone.now() - datetime.timedelta(days=30)
    versions = []
    for index, label in enumerate(["1.3", "1.4", "1.5"]):
        version = services.create_version(
            detector,
            label,
            users["engineer"],
            created_at=start + datetime.timedelta(days=10 * index),
            source_commit="9f2c4e1a7b3d",
        )
        day, night, jitter = demo.version_quality("forward", index + 4, label)
        for loaded, truth in splits:
            detections = demo.predictions(truth, day, night, jitter, seed=100 * index + loaded.pk)
            run_tasks(
                services.submit_predictions,
                version,
                loaded,
                ContentFile(json.dumps(detections).encode(), name=f"{label}-{loaded.name}.json"),
                users["engineer"],
            )
        versions.append(version)
    services.sign_off(versions[0], users["lead"], "approved", "Clear gain, night included.")
    rule = {"kind": "no_significant_drop", "metric": "AP", "class": "*", "split": "*"}
    criteria.set_criteria(detector, users["lead"], [rule])
    criteria.set_criteria(
        detector, users["lead"], [rule, {"kind": "max_drop", "class": "mean", "tolerance": 1}]
    )
    for version in versions[1:]:
        judging.judge(version.pk)
    return splits, versions


def _pages(detector, splits, versions):
    split = splits[0][0]
    return {
        "overview": "/",
        "splits": "/splits/",
        "split": f"/splits/{split.pk}/",
        "detector": f"/detectors/{detector.pk}/",
        "version": f"/versions/{versions[-1].pk}/",
        "baseline": f"/versions/{versions[0].pk}/",
        "compare": f"/detectors/{detector.pk}/compare/",
        "criteria": f"/detectors/{detector.pk}/criteria/",
        "suite": f"/detectors/{detector.pk}/suite/",
        "new-detector": "/detectors/new/",
        "evidence": f"/versions/{versions[0].pk}/evidence/",
        "evidence-api": f"/api/v1/versions/{versions[0].pk}/evidence/?format=html",
        "audit": "/audit/",
        "tokens": "/account/tokens/",
        "upload": f"/detectors/{detector.pk}/upload/",
        "load-split": "/splits/load/",
        "images": f"/versions/{versions[-1].pk}/images/?split={split.pk}&class=pedestrian",
        "image": f"/versions/{versions[-1].pk}/images/{split.pk}/0/?class=pedestrian",
        "confusion": f"/versions/{versions[-1].pk}/confusion/?split={split.pk}&row=3&col=3",
        "not-found": "/versions/999999/",
    }


def test_no_table_overflows_or_overlaps_at_1280_and_390(page, live_server, detector, demo_like):
    splits, versions = demo_like
    found = {}
    for width, height in WIDTHS.items():
        page.set_viewport_size({"width": width, "height": height})
        for name, path in _pages(detector, splits, versions).items():
            response = page.goto(f"{live_server.url}{path}")
            assert response.status == (404 if name == "not-found" else 200), (name, path)
            if name == "evidence-api":
                assert "Evidence report" in page.content()
            problems = page.evaluate(MEASURE)
            if problems:
                found[f"{name}@{width}"] = problems
            shot(page, f"layout-{name}-{width}")
    assert not found, json.dumps(found, indent=1)


def test_the_audit_verification_reads_and_fits(browser, live_server, users, demo_like, flushable):
    """A reviewer runs the full verification from the audit page, once on intact data and
    once after an owner edited a score: the page says what was checked and when, lists
    the finding, and fits at 1280 and 390 px (screenshots audit-verified-*)."""
    from evaluation.models import ClassScore
    from tests.platform.conftest import triggers_off

    page = signed_in(browser, live_server, "reviewer")
    page.goto(f"{live_server.url}/audit/")
    assert "not run yet" in page.inner_text("#chain-status")
    page.click("#verify-now button")
    assert "no findings" in page.inner_text("#chain-status")
    assert "re-hashed" in page.inner_text("#verification-scope")
    shot(page, "audit-verified-ok-1280")
    with triggers_off():
        ClassScore.objects.filter(class_name="pedestrian").update(ap=0.999)
    page.click("#verify-now button")
    assert "no longer matches its digest (classes)" in page.inner_text("#verification-findings")
    found = {}
    for width, height in WIDTHS.items():
        page.set_viewport_size({"width": width, "height": height})
        page.goto(f"{live_server.url}/audit/")
        problems = page.evaluate(MEASURE)
        if problems:
            found[width] = problems
        shot(page, f"audit-verified-findings-{width}")
    page.context.close()
    assert not found, json.dumps(found, indent=1)
