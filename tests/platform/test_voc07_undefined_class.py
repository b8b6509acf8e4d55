"""A ``voc07`` class whose every detection is ignored has no AP, end to end.

The VOC 2007 devkit's ``VOCevaldet.m`` leaves a detection on a difficult box neither TP
nor FP; when that is every detection of a class, ``prec = tp./(fp+tp)`` is 0/0 all
along and its 11-point loop's ``p=max(prec(rec>=t))`` at t = 0 is NaN (MATLAB's max
of NaN alone, from memory), so the class's ``ap`` is NaN. The engine reports the class
absent (None) with the reason in ``protocol_record.absent_classes`` and leaves it out
of the mean (DEVELOPERS.md, "Undefined classes"). Here: the stored numbers equal the
devkit transliteration ``oracle.voc_ap(..., eleven_point=True)`` (tests/engine/
oracle.py, written from the published code's logic); the per-class tables of the
version page, the compare page (with its bootstrap intervals), the evidence report
and the API show the class as not measured with the engine's reason, never as 0; the
gate reads it as not measured (no data, with the reason), the mean as the mean over the
other class, and no rule kind crashes on it.
"""

import json

import numpy as np
import pytest
from django.urls import reverse

from evaluation import services as evaluation_services
from evaluation.engine import load_predictions, load_truth
from evaluation.models import ClassScore, Evaluation
from releases import criteria, services, verdicts
from releases import tasks as release_tasks
from releases.models import ComparisonInterval, Outcome

from ..engine import oracle
from .conftest import in_process, upload
from .test_api import API, client_for

pytestmark = pytest.mark.django_db
N_IMAGES = 10
REASON = "every detection of the class is ignored"
CAR_DIFFICULT, CAR = [10, 10, 40, 30], [100, 60, 40, 30]
VAN_DIFFICULT, VAN = [10, 90, 40, 30], [100, 10, 40, 30]


def _split():
    """Per image a difficult and a counted box of ``car`` and of ``van``."""
    annotations = []
    for image in range(1, N_IMAGES + 1):
        for category, box, difficult in (
            (1, CAR_DIFFICULT, 1),
            (1, CAR, 0),
            (2, VAN_DIFFICULT, 1),
            (2, VAN, 0),
        ):
            annotations.append(
                {
                    "id": len(annotations) + 1,
                    "image_id": image,
                    "category_id": category,
                    "bbox": box,
                    "area": box[2] * box[3],
                    "iscrowd": 0,
                    "difficult": difficult,
                }
            )
    return {
        "images": [{"id": i, "width": 200, "height": 150} for i in range(1, N_IMAGES + 1)],
        "annotations": annotations,
        "categories": [{"id": 1, "name": "car"}, {"id": 2, "name": "van"}],
    }


def _detections(seed, car_on_counted):
    """Van: a hit on its counted box (most images), a detection on its difficult box, a
    false positive now and then. Car: a detection (and a shifted copy) on its difficult
    box only, unless ``car_on_counted``, which adds hits on its counted box."""
    rng = np.random.default_rng(seed)
    dets = []

    def add(image, category, box, dx=0):
        dets.append(
            {
                "image_id": image,
                "category_id": category,
                "bbox": [box[0] + dx, box[1], box[2], box[3]],
                "score": round(float(rng.uniform(0.05, 0.99)), 3),
            }
        )

    for image in range(1, N_IMAGES + 1):
        add(image, 1, CAR_DIFFICULT)
        add(image, 1, CAR_DIFFICULT, dx=3)  # IoU > 0.5 with the difficult box: ignored too
        if car_on_counted and rng.random() < 0.7:
            add(image, 1, CAR)
        if rng.random() < 0.8:
            add(image, 2, VAN)
        add(image, 2, VAN_DIFFICULT)
        if rng.random() < 0.4:
            add(image, 2, [150, 110, 30, 30])
    return dets


def _devkit(truth_json, dets, tmp_path):
    """{class: 11-point AP or None} from the devkit transliteration on the same files."""
    (tmp_path / "gt.json").write_text(json.dumps(truth_json))
    (tmp_path / "dt.json").write_text(json.dumps(dets))
    truth = load_truth(tmp_path / "gt.json")
    ap = oracle.voc_ap(truth, load_predictions(tmp_path / "dt.json", truth), eleven_point=True)
    return {c: None if np.isnan(v) else float(v) for c, v in zip(truth.classes, ap)}


@pytest.fixture
def scored(team, users, run_tasks, tmp_path, django_capture_on_commit_callbacks):
    """1.0 (car measured) approved as the baseline; 1.1 whose car detections all lie on
    difficult boxes (car undefined under voc07)."""
    truth = _split()
    split = evaluation_services.load_split(
        name="depot-yard", revision=1, truth=upload("depot-yard.json", truth)
    )
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(
            team, "Depot camera", ["car", "van"], protocols=("voc07",), splits=["depot-yard"]
        )
    out = {"detector": detector, "split": split, "truth": truth}
    for label, seed, on_counted in (("1.0", 3, True), ("1.1", 4, False)):
        version = services.create_version(detector, label, users["engineer"])
        dets = _detections(seed, on_counted)
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload(f"{label}.json", dets),
            users["engineer"],
        )
        out[label] = version
        out[f"ap {label}"] = _devkit(truth, dets, tmp_path)
    run_tasks(services.sign_off, out["1.0"], users["lead"], "approved", "baseline")
    return out


def _card(version):
    return Evaluation.objects.get(prediction_sets__version=version, protocol="voc07").scorecard


def test_the_stored_numbers_are_the_devkits(scored):
    """Devkit: car NaN in 1.1, a number in 1.0; van a number in both; the stored mean
    is van's AP alone in 1.1 (the devkit's own mean would be NaN)."""
    base, candidate = scored["ap 1.0"], scored["ap 1.1"]
    assert candidate["car"] is None and base["car"] is not None and base["car"] > 0
    for label in ("1.0", "1.1"):
        card, expected = _card(scored[label]), scored[f"ap {label}"]
        rows = {r.class_name: r.ap for r in ClassScore.objects.filter(scorecard=card)}
        for name in ("car", "van"):
            if expected[name] is None:
                assert rows[name] is None
            else:
                assert rows[name] == pytest.approx(expected[name], abs=1e-12)
        defined = [v for v in expected.values() if v is not None]
        assert card.summary["AP"] == pytest.approx(sum(defined) / len(defined), abs=1e-12)
    record = _card(scored["1.1"]).result["protocol_record"]
    assert record["averaged_classes"] == ["van"]
    assert REASON in record["absent_classes"]["car"]


def _car_cells(html, table_id=None):
    """The cells after the first of the table row whose first cell is ``car`` (in
    table ``table_id``), as text."""
    import re

    if table_id:
        html = re.search(rf'id="{table_id}".*?</table>', html, re.S).group(0)
    row = re.search(r"<tr[^>]*>\s*<td>car</td>(.*?)</tr>", html, re.S)
    assert row, "no car row"
    cells = re.findall(r"<td[^>]*>(.*?)</td>", row.group(1), re.S)
    return [re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", c)).strip() for c in cells]


def test_the_pages_show_the_class_as_not_measured_with_the_reason(
    scored, users, client, run_tasks, monkeypatch
):
    client.force_login(users["engineer"])
    candidate, base = scored["1.1"], scored["1.0"]
    page = client.get(reverse("version", args=[candidate.pk])).content.decode()
    # AP, AP50, AP75 absent; GT counted. Best F1 is 0 = 2TP / (2TP + FP + FN) with
    # TP = FP = 0 (its definition, common practice), a number, unlike precision.
    assert _car_cells(page)[:4] == ["—", "—", "—", str(N_IMAGES)]
    assert REASON in page.split(f'id="absent-{scored["split"].pk}"')[1].split("</ul>")[0]
    van = f"{scored['ap 1.1']['van']:.3f}"
    assert van in page
    # compare: no delta for car (none of the two numbers is 0), van's delta shown
    monkeypatch.setattr(release_tasks.compare, "delay", in_process(release_tasks.compare))
    pair = {"reference": base.pk, "candidate": candidate.pk}
    response = run_tasks(
        client.post, reverse("compare-intervals", args=[scored["detector"].pk]), pair
    )
    assert response.status_code == 302
    row = ComparisonInterval.objects.get()
    assert row.state == "done", row.error
    assert row.intervals[""]["car"] == [None, None]
    url = reverse("compare", args=[scored["detector"].pk])
    compare = client.get(url, pair)
    assert compare.status_code == 200
    html = compare.content.decode()
    reference_ap, candidate_ap, delta = _car_cells(html, f"deltas-{scored['split'].pk}")[:3]
    assert reference_ap == f"{scored['ap 1.0']['car']:.3f}"
    assert (candidate_ap, delta) == ("—", "—")
    absent = html.split(f'id="absent-{scored["split"].pk}"')[1].split("</ul>")[0]
    assert "car has no AP in 1.1" in absent and REASON in absent and "in 1.0" not in absent
    deltas = {d["class"]: d for d in compare.context["splits"][0]["deltas"]}
    assert deltas["car"]["delta"] is None
    assert deltas["van"]["delta"] == pytest.approx(
        scored["ap 1.1"]["van"] - scored["ap 1.0"]["van"], abs=1e-12
    )
    # the evidence report and its JSON, the history page
    evidence = client.get(reverse("evidence", args=[candidate.pk]))
    assert evidence.status_code == 200 and REASON in evidence.content.decode()
    body = client.get(reverse("evidence-json", args=[candidate.pk]))
    assert body.status_code == 200
    report = json.loads(body.content, parse_constant=lambda c: pytest.fail(f"{c} in the JSON"))
    assert REASON in report["splits"][0]["absent_classes"]["car"]
    assert client.get(reverse("detector", args=[scored["detector"].pk])).status_code == 200
    # the API's results: null, with the reason
    results = client_for(users["engineer"]).get(f"{API}versions/{candidate.pk}/results/")
    assert results.status_code == 200
    (entry,) = results.json()["splits"]
    assert REASON in entry["absent_classes"]["car"] and "van" not in entry["absent_classes"]
    car = next(c for c in entry["classes"] if c["class"] == "car")
    assert (car["AP"], car["AP50"], car["AP75"]) == (None, None, None)


def _judged(scored, users, run_tasks, rules):
    run_tasks(criteria.set_criteria, scored["detector"], users["lead"], rules)
    latest = scored["detector"].criteria.order_by("-number").first()
    outcomes = Outcome.objects.filter(version=scored["1.1"], criteria=latest).order_by("id")
    return verdicts.verdict_of(scored["1.1"]), list(outcomes)


def test_the_gate_cannot_judge_the_class_and_never_passes_it(scored, users, run_tasks):
    """Every rule kind on car: *missing* with the engine's reason (never judged as an
    AP of 0, never a silent pass, never a crash): car has counted boxes and the
    baseline's AP, so the verdict is incomplete and approving 1.1 is an override that
    needs a written justification; the mean is van's AP; van judged as usual."""
    van, base_van = scored["ap 1.1"]["van"], scored["ap 1.0"]["van"]
    rules = [
        {"kind": "min_value", "class": "mean", "threshold": 0.0},
        {"kind": "min_value", "class": "car", "threshold": 0.0},
        {"kind": "max_drop", "class": "car", "tolerance": 100.0},
        {"kind": "no_significant_drop", "class": "*", "tolerance": 100.0},
        {"kind": "max_drop", "class": "mean", "tolerance": 100.0},
        {"kind": "no_significant_drop", "class": "mean", "tolerance": 100.0},
    ]
    verdict, outcomes = _judged(scored, users, run_tasks, rules)
    assert verdict.state == "incomplete", verdict.reasons
    assert verdict.reasons and all(REASON in r for r in verdict.reasons)
    by = {(o.rule_index, o.class_name): o for o in outcomes}
    assert by[(0, "mean")].value == pytest.approx(van, abs=1e-12)
    for key in ((1, "car"), (2, "car"), (3, "car")):
        outcome = by[key]
        assert outcome.status == "missing" and outcome.value is None, outcome.detail
        assert REASON in outcome.detail and "cannot be judged" in outcome.detail
    with pytest.raises(services.DecisionError, match="needs a written justification"):
        services.sign_off(scored["1.1"], users["lead"], "approved", "looks fine")
    # van is judged as usual beside it: a finite interval from the paired bootstrap
    significance = by[(3, "van")]
    assert significance.value == pytest.approx(van, abs=1e-12)
    assert significance.baseline_value == pytest.approx(base_van, abs=1e-12)
    assert (
        significance.low <= significance.high
        and np.isfinite([significance.low, significance.high]).all()
    )
    assert significance.status in ("pass", "not significant"), significance.detail
    mean_drop = by[(4, "mean")]
    assert mean_drop.status == "pass"
    defined = [v for v in scored["ap 1.0"].values() if v is not None]
    assert mean_drop.baseline_value == pytest.approx(sum(defined) / len(defined), abs=1e-12)
    mean_significance = by[(5, "mean")]
    assert mean_significance.value == pytest.approx(van, abs=1e-12)
    assert np.isfinite([mean_significance.low, mean_significance.high]).all()
    # a threshold above van's AP fails the mean: the absent class is no 0 dragging it
    # down, and no missing number passing it
    above = round(van + 0.01, 3)
    verdict, outcomes = _judged(
        scored, users, run_tasks, [{"kind": "min_value", "class": "mean", "threshold": above}]
    )
    assert verdict.state == "regression" and outcomes[0].value == pytest.approx(van)
    verdict, _ = _judged(scored, users, run_tasks, rules)  # back to the car rules
    assert verdict.state == "incomplete"
    record, event = services.sign_off(
        scored["1.1"],
        users["lead"],
        "approved",
        "car checked by hand",
        justification="car boxes on the depot apron are all marked difficult this month",
    )
    assert record.override and record.verdict == "incomplete" and event.kind == "override"


def _first_release(team, users, run_tasks, capture, rule, detections):
    """A first release (no baseline) of a detector of car and van under voc07, on a
    split whose images all carry the tag ``night``, judged on ``rule``."""
    truth = _split()
    for image in truth["images"]:
        image["tags"] = ["night"]
    split = evaluation_services.load_split(
        name="depot-yard", revision=1, truth=upload("depot-yard.json", truth)
    )
    with capture(execute=True):
        detector = services.create_detector(
            team, "Depot camera", ["car", "van"], protocols=("voc07",), splits=["depot-yard"]
        )
    run_tasks(criteria.set_criteria, detector, users["lead"], [rule])
    version = services.create_version(detector, "1.0", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("1.0.json", detections),
        users["engineer"],
    )
    return version, list(Outcome.objects.filter(version=version))


@pytest.mark.parametrize(
    "rule, undefined",
    [
        # a tag slice of the undefined class: the whole split's reason holds there too
        ({"class": "car", "kind": "min_value", "threshold": 0.1, "tag": "night"}, "car"),
        # the mean when every class is undefined: no number, not "nothing to measure"
        ({"class": "mean", "kind": "min_value", "threshold": 0.1}, "every"),
    ],
)
def test_a_first_release_cannot_pass_on_an_undefined_ap(
    team, users, run_tasks, django_capture_on_commit_callbacks, rule, undefined
):
    """No baseline to compare with, and the rule's number is undefined (the VOC 2007
    devkit's NaN): the rule is missing, the verdict incomplete, and a plain approval
    is refused (an override needs a written justification)."""
    detections = _detections(4, False)
    if undefined == "every":  # van too: only on its difficult box
        cars = [d for d in detections if d["category_id"] == 1]
        detections = cars + [dict(d, category_id=2, bbox=list(VAN_DIFFICULT)) for d in cars]
    rule = {"split": "*", "metric": "AP", **rule}
    version, outcomes = _first_release(
        team, users, run_tasks, django_capture_on_commit_callbacks, rule, detections
    )
    assert verdicts.verdict_of(version).state == "incomplete"
    (outcome,) = [o for o in outcomes if o.class_name == rule["class"]]
    assert outcome.status == "missing" and REASON in outcome.detail, outcome.detail
    with pytest.raises(services.DecisionError, match="needs a written justification"):
        services.sign_off(version, users["lead"], "approved", "looks fine")
