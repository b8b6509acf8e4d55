"""A benchmark suite may name a stored custom protocol, or define one inline: checked by
the engine's protocol validation (errors name ``protocols[i].field``), stored once under
its name (append-only: a name keeps its definition), written to the audit trail with
the suite version, and scored by the worker like a preset."""

import contextlib
import io
import json

import numpy as np
import pytest
from rest_framework.test import APIClient

from evaluation.models import Evaluation, StoredProtocol
from releases import criteria, services, suites, verdicts
from releases.audit import verify_audit
from releases.models import AuditEvent

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db
API = "/api/v1/"
IOU60 = {"name": "iou60", "base": "coco", "iou_thresholds": [0.6], "version": 1}
EASY = {"kind": "min_value", "metric": "AP", "class": "mean", "split": "*", "threshold": 0.0}


def _api(user):
    from releases import tokens

    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(user, 't')[1]}")
    return client


def _pycocotools_ap(truth, detections, iou, tmp_path):
    """The reference: pycocotools 2.0.11 ``COCOeval(..., 'bbox')`` with its IoU
    thresholds set to the one value; ``stats[0]`` is then AP at that IoU."""
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    (tmp_path / "gt.json").write_text(json.dumps(truth))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO(str(tmp_path / "gt.json"))
        evaluator = COCOeval(gt, gt.loadRes(str(tmp_path / "dt.json")), "bbox")
        evaluator.params.iouThrs = np.array([iou])
        evaluator.evaluate()
        evaluator.accumulate()
        evaluator.summarize()
    return evaluator.stats[0]


def test_a_suite_defines_a_custom_protocol_scored_as_the_reference_scores_it(
    detector, version, split, split_truth, users, run_tasks, tmp_path
):
    run_tasks(
        suites.set_suite,
        detector,
        users["lead"],
        {"splits": ["bay-night"], "protocols": [IOU60, "coco"]},
    )
    suite = suites.current_suite(detector)
    assert suite.protocols == ["iou60", "coco"]
    stored = StoredProtocol.objects.get()
    assert (stored.name, stored.definition, stored.created_by) == ("iou60", IOU60, "lead")
    event = AuditEvent.objects.filter(kind="suite changed").order_by("-id").first()
    assert event.payload["suite"]["custom_protocols"] == {"iou60": IOU60}
    assert suites.custom_definitions(suite) == {"iou60": IOU60}

    criteria.set_criteria(detector, users["lead"], [EASY])
    detections = detections_for(split_truth)
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", detections), users["engineer"]
    )
    evaluation = Evaluation.objects.get(protocol="iou60")
    assert evaluation.state == "done", evaluation.error
    card = evaluation.scorecard
    assert card.result["protocol_record"]["iou_thresholds"] == [0.6]
    expected = _pycocotools_ap(split_truth, detections, 0.6, tmp_path)
    assert card.summary["AP"] == pytest.approx(expected, abs=1e-12)
    # The criteria read the primary (custom) protocol; judging resolves it too.
    verdict = verdicts.verdict_of(version)
    assert verdict.state == "pass", verdict.reasons
    assert [e.protocol for e in verdict.evaluations] == ["iou60", "coco"]
    assert verify_audit()[0] is None

    # By name in a later suite version: the stored definition, no new row.
    run_tasks(
        suites.set_suite, detector, users["lead"], {"splits": ["bay-night"], "protocols": ["iou60"]}
    )
    assert StoredProtocol.objects.count() == 1
    assert suites.current_suite(detector).protocols == ["iou60"]


@pytest.mark.parametrize(
    "entry, path, message",
    [
        ({**IOU60, "iou_thresholds": [1.5]}, "protocols[0].iou_thresholds", "outside [0.0, 1.0]"),
        ({**IOU60, "matching": "hungarian"}, "protocols[0].matching", "must be"),
        ({**IOU60, "name": "coco"}, "protocols[0].name", "is a preset"),
        ({**IOU60, "name": "kitti2d"}, "protocols[0].name", "is a preset"),
        ({**IOU60, "name": "COCO"}, "protocols[0].name", "is a preset"),  # audit12 F9
        # audit12 F1: an integer beyond float64 gave HTTP 500 (OverflowError)
        ({**IOU60, "iou_thresholds": [10**400]}, "protocols[0].iou_thresholds", "outside"),
        ({**IOU60, "version": True}, "protocols[0].version", "whole number"),
        ({**IOU60, "name": "night iou!"}, "protocols[0].name", "a name of 1 to 32"),
        ({**IOU60, "stride": 2}, "protocols[0].stride", "unknown key"),
        ("nightly", "protocols[0]", "unknown protocol 'nightly'"),
        (7, "protocols[0]", "must be a protocol's name or a custom protocol's definition"),
    ],
)
def test_bad_custom_protocols_are_refused_naming_the_field(
    detector, split, users, entry, path, message
):
    before = (StoredProtocol.objects.count(), detector.suites.count())
    response = _api(users["lead"]).post(
        f"{API}detectors/{detector.pk}/suite/",
        {"splits": ["bay-night"], "protocols": [entry]},
        format="json",
    )
    body = response.json()
    assert response.status_code == 400, body
    assert body["errors"][0]["path"] == path, body
    assert message in body["message"], body
    assert (StoredProtocol.objects.count(), detector.suites.count()) == before


def test_a_stored_name_keeps_its_definition(detector, split, users):
    suites.set_suite(detector, users["lead"], {"splits": ["bay-night"], "protocols": [IOU60]})
    with pytest.raises(suites.SuiteError, match="protocols\\[0\\].name: 'iou60' is already stored"):
        suites.set_suite(
            detector,
            users["lead"],
            {"splits": ["bay-night"], "protocols": [{**IOU60, "iou_thresholds": [0.7]}]},
        )
    # The same definition again is the same protocol.
    suites.set_suite(detector, users["lead"], {"splits": ["bay-night"], "protocols": [IOU60]})
    assert StoredProtocol.objects.count() == 1


def test_stored_protocols_are_append_only(detector, split, users):
    from django.db import DatabaseError, transaction

    suites.set_suite(detector, users["lead"], {"splits": ["bay-night"], "protocols": [IOU60]})
    for attempt in (
        lambda: StoredProtocol.objects.update(definition={**IOU60, "iou_thresholds": [0.9]}),
        lambda: StoredProtocol.objects.all().delete(),
    ):
        with pytest.raises(DatabaseError), transaction.atomic():
            attempt()
    assert StoredProtocol.objects.get().definition == IOU60


def test_the_suite_page_shows_the_custom_definitions(client, detector, split, users):
    suites.set_suite(detector, users["lead"], {"splits": ["bay-night"], "protocols": [IOU60]})
    client.force_login(users["reviewer"])
    page = client.get(f"/detectors/{detector.pk}/suite/").content.decode()
    assert 'id="custom-protocols"' in page and "iou60" in page and "0.6" in page


KERB_SIZES = {
    "name": "kerbsize",
    "base": "coco",
    "version": 1,
    "area_ranges": [["all", 0, 1e10], ["tiny", 0, 40**2], ["near", 40**2, 1e10]],
}


def _pycocotools_area_ap(truth, detections, ranges, tmp_path):
    """The reference: pycocotools 2.0.11 ``COCOeval`` with ``params.areaRng`` /
    ``areaRngLbl`` set to the protocol's ranges; a bucket's AP is the mean of
    ``eval['precision'][:, :, k, a, -1]`` over entries > -1 (as ``summarize`` takes
    it), per class ``k`` and over all classes."""
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    (tmp_path / "gt.json").write_text(json.dumps(truth))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO(str(tmp_path / "gt.json"))
        evaluator = COCOeval(gt, gt.loadRes(str(tmp_path / "dt.json")), "bbox")
        evaluator.params.areaRng = [[low, high] for _, low, high in ranges]
        evaluator.params.areaRngLbl = [name for name, _, _ in ranges]
        evaluator.evaluate()
        evaluator.accumulate()
    precision = evaluator.eval["precision"]
    names = {c["id"]: c["name"] for c in truth["categories"]}
    out = {}
    for a, (bucket, _, _) in enumerate(ranges):
        cells = precision[:, :, :, a, -1]
        present = cells[cells > -1]
        out[bucket] = {"mean": float(present.mean()) if present.size else None}
        for k, cid in enumerate(evaluator.params.catIds):
            cls = cells[:, :, k]
            out[bucket][names[cid]] = float(cls[cls > -1].mean()) if (cls > -1).any() else None
    return out


def test_a_custom_protocols_own_size_buckets_are_scored_sliced_and_judged(
    detector, version, split, split_truth, users, run_tasks, tmp_path
):
    """A suite defines a protocol with its own area ranges: the worker scores its
    buckets as pycocotools does with those ranges, stores them as size slices, a rule
    may name them (and is judged on them), and COCO's own bucket names are refused by
    validation of the same suite only when no protocol has them."""
    run_tasks(
        suites.set_suite,
        detector,
        users["lead"],
        {"splits": ["bay-night"], "protocols": [KERB_SIZES]},
    )
    detections = detections_for(split_truth)
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", detections), users["engineer"]
    )
    card = Evaluation.objects.get(protocol="kerbsize").scorecard
    assert card.result["protocol_record"]["size_ranges"] == KERB_SIZES["area_ranges"]
    from evaluation.models import SliceScore

    rows = SliceScore.objects.filter(scorecard=card, kind="size")
    assert {r.name for r in rows} == {"tiny", "near"}
    expected = _pycocotools_area_ap(
        split_truth, detections, [tuple(r) for r in KERB_SIZES["area_ranges"]], tmp_path
    )
    for row in rows:
        want = expected[row.name][row.class_name or "mean"]
        if want is None:
            assert row.ap is None, (row.name, row.class_name)
        else:
            assert row.ap == pytest.approx(want, abs=1e-12), (row.name, row.class_name)

    tiny = expected["tiny"]["mean"]
    rule = {**EASY, "size": "tiny", "threshold": round(tiny + 0.01, 4)}
    run_tasks(criteria.set_criteria, detector, users["lead"], [rule])
    verdict = verdicts.verdict_of(version)
    assert verdict.state == "regression", verdict.reasons
    run_tasks(criteria.set_criteria, detector, users["lead"], [{**rule, "threshold": 0.0}])
    assert verdicts.verdict_of(version).state == "pass"
    with pytest.raises(criteria.CriteriaError, match="must be a size bucket") as e:
        criteria.set_criteria(detector, users["lead"], [{**EASY, "size": "huge"}])
    assert e.value.path == "rules[0].size"
    # COCO's names stay valid rule names, but this protocol has no "small" bucket:
    # the outcome is missing, the verdict incomplete — never a pass.
    run_tasks(criteria.set_criteria, detector, users["lead"], [{**EASY, "size": "small"}])
    verdict = verdicts.verdict_of(version)
    assert verdict.state == "incomplete", verdict.reasons
    assert "has no size bucket 'small'" in " ".join(verdict.reasons)


@pytest.mark.parametrize(
    "ranges, path, message",
    [
        ([["small", 0, 1024]], "protocols[0].area_ranges", "the first range is ['all', 0, high]"),
        ([["all", 0, 1e10], ["x", 9, 3]], "protocols[0].area_ranges[1]", "0 <= low < high"),
        ([["all", 0, 1e10], ["x y", 0, 3]], "protocols[0].area_ranges[1]", "name: 1 to 32"),
        ([["all", 0, 1e10], ["all", 0, 3]], "protocols[0].area_ranges", "twice"),
        ("big", "protocols[0].area_ranges", "non-empty list"),
    ],
)
def test_bad_area_ranges_are_refused_naming_the_entry(detector, split, ranges, path, message):
    spec = {"splits": ["bay-night"], "protocols": [{**KERB_SIZES, "area_ranges": ranges}]}
    with pytest.raises(suites.SuiteError) as e:
        suites.validate_suite(detector, spec)
    assert e.value.path == path and message in str(e.value)
