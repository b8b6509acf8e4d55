"""What a verdict was judged on cannot change under it without a trace and a new
judgement: the detector's class list (a ``*`` rule covers it), the prediction sets
(evidence, never deleted), and class names that rules read as words ('mean', '*').

Each test is a way around "no plain approval of a candidate not fully scored and
judged" found by a review; each failed before its fix. The AP values the verdicts
rest on are COCO-style AP (common practice: a class without any detection has AP 0,
a perfectly detected one AP 1).
"""

import json

import pytest
from django.contrib.auth import get_user_model
from django.core.exceptions import PermissionDenied
from rest_framework.test import APIClient

from evaluation import services as evaluation_services
from releases import criteria, detectors, services, verdicts
from releases.models import AuditEvent, Detector, PredictionSet, SignOff

from .conftest import upload

pytestmark = pytest.mark.django_db
EVERY_CLASS = {"split": "*", "class": "*", "metric": "AP", "kind": "max_drop", "tolerance": 5.0}


def _truth(names=("car", "van")):
    images, annotations = [], []
    for i in range(1, 7):
        images.append({"id": i, "width": 200, "height": 200})
        for c in (1, 2):
            box = [10 + 60 * c, 10, 30, 30]
            annotations.append(
                {"id": len(annotations) + 1, "image_id": i, "category_id": c, "bbox": box}
                | {"area": 900, "iscrowd": 0}
            )
    categories = [{"id": k + 1, "name": n} for k, n in enumerate(names)]
    return {"images": images, "annotations": annotations, "categories": categories}


def _detections(classes=(1, 2)):
    """Exact boxes (AP 1 for each class listed, none for the others: AP 0)."""
    return [
        {"image_id": i, "category_id": c, "bbox": [10 + 60 * c, 10, 30, 30], "score": 0.5 + i / 20}
        for i in range(1, 7)
        for c in classes
    ]


def _yard(names=("car", "van")):
    return evaluation_services.load_split(
        name="yard-a", revision=1, truth=upload("yard-a.json", _truth(names))
    )


def _version(detector, label, split, detections, users, run_tasks):
    version = services.create_version(detector, label, users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload(f"{label}.json", detections),
        users["engineer"],
    )
    return version


def _baseline_and_candidate(team, users, run_tasks, capture, classes, candidate_classes):
    split = _yard()
    with capture(execute=True):
        detector = services.create_detector(team, "Yard cam", classes, splits=("yard-a",))
    run_tasks(criteria.set_criteria, detector, users["lead"], [EVERY_CLASS])
    base = _version(detector, "1.0", split, _detections(), users, run_tasks)
    run_tasks(services.sign_off, base, users["lead"], "approved", "baseline", justification="v1")
    candidate = _version(detector, "1.1", split, _detections(candidate_classes), users, run_tasks)
    return detector, split, candidate


def _superuser(client):
    admin = get_user_model().objects.create_superuser("root", "r@example.invalid", "pw-root")
    client.force_login(admin)
    return admin


def _admin_form(client, detector, **changes):
    url = f"/admin/releases/detector/{detector.pk}/change/"
    form = client.get(url).context["adminform"].form
    data = {}
    for name in form.fields:
        value = form.initial.get(name)
        data[name] = "" if value is None else getattr(value, "pk", value)
    data["classes"] = json.dumps(data["classes"]) if isinstance(data["classes"], list) else ""
    return url, data | changes


# P2: the class list ------------------------------------------------------------------


def test_a_class_added_in_the_admin_judges_the_candidate_again(
    team, users, run_tasks, django_capture_on_commit_callbacks, client
):
    """Judged on ['car'] (pass); 'van' added: the '*' rule now covers van, where the
    candidate has AP 0 and the baseline 1.0, so the verdict is judged again: regression,
    and a plain approval is refused."""
    detector, _, candidate = _baseline_and_candidate(
        team, users, run_tasks, django_capture_on_commit_callbacks, ["car"], (1,)
    )
    assert verdicts.verdict_of(candidate).state == "pass"
    suite_before = verdicts.verdict_of(candidate).judgement.suite
    _superuser(client)
    url, data = _admin_form(client, detector, classes=json.dumps(["car", "van"]))
    response = run_tasks(client.post, url, data)
    assert response.status_code == 302, response.context and response.context["errors"]
    detector.refresh_from_db()
    assert detector.classes == ["car", "van"]
    verdict = verdicts.verdict_of(candidate)
    assert verdict.state == "regression", (verdict.state, verdict.reasons)
    assert any("AP of van" in r for r in verdict.reasons)
    assert verdict.judgement.suite.number == suite_before.number + 1
    event = AuditEvent.objects.filter(kind=AuditEvent.Kind.SUITE_CHANGED).last()
    assert (event.payload["classes_before"], event.payload["classes"]) == (["car"], ["car", "van"])
    assert event.actor == "root"
    with pytest.raises(services.DecisionError, match="override"):
        services.sign_off(candidate, users["lead"], "approved", "fine")
    assert not SignOff.objects.filter(version=candidate).exists()


def test_the_admin_refuses_reserved_names_and_removing_a_named_class(
    team, users, run_tasks, django_capture_on_commit_callbacks, client
):
    _yard()
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(team, "Yard cam", ["car", "van"], splits=("yard-a",))
    rule = {"split": "*", "class": "van", "metric": "AP", "kind": "min_value", "threshold": 0.1}
    run_tasks(criteria.set_criteria, detector, users["lead"], [rule])
    _superuser(client)
    suites_before = detector.suites.count()
    for classes, message in (
        (["car", "van", " Mean "], "classes[2]: &#x27;Mean&#x27; is reserved"),
        (["car", "van", "*"], "classes[2]: &#x27;*&#x27; is reserved"),
        (["car"], "&#x27;van&#x27; is named by rule 1 of the criteria"),
    ):
        url, data = _admin_form(client, detector, classes=json.dumps(classes))
        response = client.post(url, data)
        assert response.status_code == 200 and message in response.content.decode(), classes
    detector.refresh_from_db()
    assert detector.classes == ["car", "van"] and detector.suites.count() == suites_before
    assert client.get("/admin/releases/detector/add/").status_code == 403


def test_set_classes_is_for_leads_and_leaves_nothing_half_done(
    team, users, django_capture_on_commit_callbacks
):
    _yard()
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(team, "Yard cam", ["car"], splits=("yard-a",))
    with pytest.raises(PermissionDenied):
        detectors.set_classes(users["engineer"], detector, ["car", "van"])
    with pytest.raises(detectors.DetectorError, match=r"classes\[1\]: ' car' is listed twice"):
        detectors.set_classes(users["lead"], detector, ["car", " car"])
    detector.refresh_from_db()
    assert detector.classes == ["car"] and detector.suites.count() == 1
    suite = detectors.set_classes(users["lead"], detector, "car, van")
    detector.refresh_from_db()
    assert detector.classes == ["car", "van"] and suite.number == 2


# P3: prediction sets are evidence ------------------------------------------------------


def test_the_admin_cannot_delete_a_prediction_set(
    team, users, run_tasks, django_capture_on_commit_callbacks, client
):
    _, _, candidate = _baseline_and_candidate(
        team, users, run_tasks, django_capture_on_commit_callbacks, ["car", "van"], (1,)
    )
    assert verdicts.verdict_of(candidate).state == "regression"
    prediction_set = PredictionSet.objects.get(version=candidate)
    _superuser(client)
    response = run_tasks(
        client.post, f"/admin/releases/predictionset/{prediction_set.pk}/delete/", {"post": "yes"}
    )
    assert response.status_code == 403
    listing = client.get("/admin/releases/predictionset/")
    assert "delete_selected" not in listing.content.decode()
    bulk = {"action": "delete_selected", "_selected_action": [prediction_set.pk], "post": "yes"}
    run_tasks(client.post, "/admin/releases/predictionset/", bulk)
    assert PredictionSet.objects.filter(pk=prediction_set.pk).exists()
    assert verdicts.verdict_of(candidate).state == "regression"


# P5: class names that are rule words ---------------------------------------------------


@pytest.mark.parametrize("name", ["mean", " MEAN ", "Mean", "*"])
def test_a_class_named_as_a_rule_word_is_refused_everywhere(team, users, name):
    _yard()
    with pytest.raises(detectors.DetectorError, match=r"^classes\[1\]: .* is reserved"):
        services.create_detector(team, "Yard cam", ["car", name])
    suite = {"splits": [{"name": "yard-a", "revision": None}]}
    with pytest.raises(detectors.DetectorError, match=r"^classes\[1\]: .* is reserved"):
        detectors.create_detector(users["lead"], team, "Yard cam", ["car", name], suite)
    api = APIClient()
    api.force_authenticate(users["lead"])
    body = {"team": team.pk, "name": "Yard cam", "classes": ["car", name], "suite": suite}
    response = api.post("/api/v1/detectors/", body, format="json")
    assert response.status_code == 400 and "classes[1]" in response.content.decode()
    assert not Detector.objects.exists()


def test_an_older_detector_with_a_class_named_mean_is_not_judged_by_the_mean(
    team, users, run_tasks, django_capture_on_commit_callbacks
):
    """A detector made before the names were refused, classes ['mean', 'van'] (the
    split's own names): the candidate detects van exactly (AP 1) and nothing of class
    'mean' (AP 0). Read by the split's mean row (AP 0.5), the '*' minimum of 0.4 passed
    class 'mean'; now the verdict is incomplete, with the reason."""
    split = _yard(("mean", "van"))
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(team, "Yard cam", ["car", "van"], splits=("yard-a",))
    Detector.objects.filter(pk=detector.pk).update(classes=["mean", "van"])  # as stored before
    detector.refresh_from_db()
    rule = {"split": "*", "class": "*", "metric": "AP", "kind": "min_value", "threshold": 0.4}
    run_tasks(criteria.set_criteria, detector, users["lead"], [rule])
    candidate = _version(detector, "1.0", split, _detections((2,)), users, run_tasks)
    verdict = verdicts.verdict_of(candidate)
    assert verdict.state == "incomplete", (verdict.state, verdict.reasons)
    assert any("class 'mean' of Yard cam is named as a rule word" in r for r in verdict.reasons)
    with pytest.raises(services.DecisionError, match="override"):
        services.sign_off(candidate, users["lead"], "approved", "fine")
    # Renamed through the service (a '*' rule names no class, so it may be): judged again.
    run_tasks(detectors.set_classes, users["lead"], detector, ["truck", "van"])
    again = verdicts.verdict_of(candidate)
    assert again.judgement.suite.number == verdict.judgement.suite.number + 1
    assert not any("rule word" in r for r in again.reasons)


def test_a_pass_judged_before_the_names_were_refused_reads_incomplete(
    team, users, run_tasks, django_capture_on_commit_callbacks
):
    """A pass recorded before this rule existed, for a detector holding a class named
    'mean' (written here as that judgement was): THE verdict reads it incomplete with
    the reason, so every page, the API and the sign-off see the same; approving is an
    override needing a justification."""
    from releases import judging

    split = _yard(("mean", "van"))
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(team, "Yard cam", ["car", "van"], splits=("yard-a",))
    Detector.objects.filter(pk=detector.pk).update(classes=["mean", "van"])
    detector.refresh_from_db()
    rule = {"split": "*", "class": "*", "metric": "AP", "kind": "min_value", "threshold": 0.4}
    run_tasks(criteria.set_criteria, detector, users["lead"], [rule])
    candidate = _version(detector, "1.0", split, _detections((2,)), users, run_tasks)
    # what the judge recorded before: a pass (judgements are append-only: a newer one)
    judgement = judging._record(candidate, verdicts.inputs_of(candidate), "pass", [], [])
    verdict = verdicts.verdict_of(candidate)
    assert verdict.state == "incomplete" and verdict.judgement.pk == judgement.pk
    assert any("named as a rule word" in r for r in verdict.reasons)
    with pytest.raises(services.DecisionError, match="override"):
        services.sign_off(candidate, users["lead"], "approved", "fine")
    services.sign_off(candidate, users["lead"], "approved", "ok", justification="why")
    record = SignOff.objects.get(version=candidate)
    assert record.override and record.verdict == "incomplete"


def test_the_admin_cannot_move_relabel_or_delete_a_version(
    team, users, run_tasks, django_capture_on_commit_callbacks, client
):
    """A version's detector and label are what its judgements and sign-offs name: the
    admin reads versions, never changes or deletes them (nor adds one)."""
    _, _, candidate = _baseline_and_candidate(
        team, users, run_tasks, django_capture_on_commit_callbacks, ["car", "van"], (1,)
    )
    _superuser(client)
    url = f"/admin/releases/modelversion/{candidate.pk}/"
    change = {"detector": candidate.detector_id, "label": "9.9", "source_commit": ""}
    assert run_tasks(client.post, url + "change/", change).status_code == 403
    assert run_tasks(client.post, url + "delete/", {"post": "yes"}).status_code == 403
    assert client.get("/admin/releases/modelversion/add/").status_code == 403
    listing = client.get("/admin/releases/modelversion/")
    assert listing.status_code == 200 and "delete_selected" not in listing.content.decode()
    candidate.refresh_from_db()
    assert candidate.label != "9.9"
    assert verdicts.verdict_of(candidate).state == "regression"
