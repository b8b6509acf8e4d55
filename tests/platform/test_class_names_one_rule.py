"""A detector's class list holds one class per name in any case: the engine's
``name_key`` (``str.casefold``), the rule every threshold, rule and page reads a class
by (rules, levels and history: test_class_names_rules_levels.py).

``validate_classes`` refused only exact repeats, so ``Car`` and ``car`` were two
classes every rule and page reads as one; every entry point is tried here, and an older
detector stored with such a pair. Each refusal test failed before the fix.

Where ``lower`` and ``casefold`` disagree is Unicode's full case folding (the Unicode
Character Database's CaseFolding.txt, as Python's ``str.casefold`` documents it: "ß"
folds to "ss", the Greek final sigma "ς" to "σ", from memory); the first test checks
that ``lower`` does disagree on the pairs used, so they test what they say.
"""

import io
import json

import pytest
from django.core.management import call_command
from django.urls import reverse
from rest_framework.test import APIClient

from releases import criteria, detectors, services, verdicts
from releases.models import Detector, Outcome

from .test_gate_what_was_judged import _admin_form, _detections, _superuser, _version, _yard

pytestmark = pytest.mark.django_db

# Pairs one class apart only in case; the last two differ under lower(), not casefold().
PAIRS = [("Car", "car"), ("VAN", "van"), ("Straße", "STRASSE"), ("ΟΔΟΣ", "οδοσ")]
SUITE = {"splits": [{"name": "yard-a", "revision": None}]}


def _api(user):
    api = APIClient()
    api.force_authenticate(user)
    return api


def test_lower_and_casefold_disagree_on_the_unicode_pairs():
    """The premise of the last two pairs (Unicode full case folding, from memory)."""
    for a, b in PAIRS[2:]:
        assert a.lower() != b.lower() and a.casefold() == b.casefold(), (a, b)


# 1. the class list: one class per name in any case ----------------------------------


@pytest.mark.parametrize("first, second", PAIRS)
def test_validate_classes_refuses_one_class_in_two_cases(first, second):
    with pytest.raises(detectors.DetectorError) as refused:
        detectors.validate_classes(["pedestrian", first, second])
    message = str(refused.value)
    assert message.startswith(f"classes[2]: {second!r} is {first!r} in another case")
    assert refused.value.path == "classes[2]"
    # the text form the page sends, stripped first
    with pytest.raises(detectors.DetectorError, match=r"^classes\[1\]: .* in another case"):
        detectors.validate_classes(f"{first}\n {second} ")
    # an exact repeat keeps its own message
    with pytest.raises(detectors.DetectorError, match=r"^classes\[1\]: .* is listed twice"):
        detectors.validate_classes([first, f" {first}"])


def test_the_services_and_the_api_refuse_the_pair_and_store_nothing(team, users):
    """``services.create_detector`` is what ``seed_demo`` and the bench scripts call (no
    command takes a class list from its user); ``detectors.create_detector`` is the
    page's and the API's."""
    _yard()
    for first, second in PAIRS:
        with pytest.raises(detectors.DetectorError, match=r"^classes\[1\]: .* in another case"):
            services.create_detector(team, "Yard cam", [first, second])
        with pytest.raises(detectors.DetectorError, match=r"^classes\[1\]: .* in another case"):
            detectors.create_detector(users["lead"], team, "Yard cam", [first, second], SUITE)
        body = {"team": team.pk, "name": "Yard cam", "classes": [first, second], "suite": SUITE}
        response = _api(users["lead"]).post("/api/v1/detectors/", body, format="json")
        assert response.status_code == 400, response.content
        error = response.json()
        assert error["message"] == (
            f"classes[1]: {second!r} is {first!r} in another case; class names match in "
            "any case (rules, thresholds, pages), so list it once"
        )
    assert not Detector.objects.exists()


def test_the_api_has_no_way_to_change_classes(team, users, django_capture_on_commit_callbacks):
    """The API creates detectors and reads them; classes change in the admin only
    (``set_classes``): a PATCH or PUT of the detector is not allowed."""
    _yard()
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(team, "Yard cam", ["car", "van"], splits=("yard-a",))
    api = _api(users["lead"])
    url = f"/api/v1/detectors/{detector.pk}/"
    for send in (api.patch, api.put):
        response = send(url, {"classes": ["car", "CAR"]}, format="json")
        assert response.status_code == 405, response.content
    detector.refresh_from_db()
    assert detector.classes == ["car", "van"] and detector.suites.count() == 1


def test_the_new_detector_page_refuses_the_pair(client, team, users):
    _yard()
    client.force_login(users["lead"])
    form = {"team": team.pk, "name": "Yard cam", "description": "", "suite": json.dumps(SUITE)}
    response = client.post("/detectors/new/", {**form, "classes": "pedestrian\nStraße, STRASSE"})
    page = response.content.decode()
    assert response.status_code == 400
    assert "classes[2]: &#x27;STRASSE&#x27; is &#x27;Straße&#x27; in another case" in page
    assert not Detector.objects.exists()


def test_the_admin_and_set_classes_refuse_the_pair(
    team, users, django_capture_on_commit_callbacks, client
):
    _yard()
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(team, "Yard cam", ["car", "van"], splits=("yard-a",))
    with pytest.raises(detectors.DetectorError, match=r"^classes\[2\]: 'Van' is 'van' in another"):
        detectors.set_classes(users["lead"], detector, ["car", "van", "Van"])
    _superuser(client)
    url, data = _admin_form(client, detector, classes=json.dumps(["car", "van", "CAR"]))
    response = client.post(url, data)
    assert response.status_code == 200
    assert "classes[2]: &#x27;CAR&#x27; is &#x27;car&#x27; in another case" in (
        response.content.decode()
    )
    detector.refresh_from_db()
    assert detector.classes == ["car", "van"] and detector.suites.count() == 1


def test_a_case_only_rename_keeps_a_rule_on_the_class(
    team, users, run_tasks, django_capture_on_commit_callbacks
):
    """A rule names ``van``; renaming the class ``Van`` drops no class (names match in
    any case, as for a suite's class thresholds), so it is allowed; dropping it is not."""
    _yard()
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(team, "Yard cam", ["car", "van"], splits=("yard-a",))
    rule = {"split": "*", "class": "van", "metric": "AP", "kind": "min_value", "threshold": 0.1}
    run_tasks(criteria.set_criteria, detector, users["lead"], [rule])
    with pytest.raises(detectors.DetectorError, match="'van' is named by rule 1"):
        detectors.set_classes(users["lead"], detector, ["car"])
    run_tasks(detectors.set_classes, users["lead"], detector, ["car", "Van"])
    detector.refresh_from_db()
    assert detector.classes == ["car", "Van"]


# An older detector stored with such a pair --------------------------------------------


@pytest.fixture
def stored_pair(team, users, run_tasks, django_capture_on_commit_callbacks):
    """A detector stored before the pair was refused (classes ``Car``, ``car``, ``van``)
    with a ``*`` rule; a candidate detecting car and van exactly (AP 1 each on
    ``yard-a``, whose categories are ``car`` and ``van``; common practice: a perfectly
    detected class has AP 1)."""
    split = _yard()
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(team, "Yard cam", ["car", "van"], splits=("yard-a",))
    Detector.objects.filter(pk=detector.pk).update(classes=["Car", "car", "van"])
    detector.refresh_from_db()
    rule = {"split": "*", "class": "*", "metric": "AP", "kind": "min_value", "threshold": 0.9}
    run_tasks(criteria.set_criteria, detector, users["lead"], [rule])
    candidate = _version(detector, "1.0", split, _detections(), users, run_tasks)
    return detector, split, candidate


def test_an_older_pair_is_judged_on_the_one_row_both_name(stored_pair):
    """Both spellings read the split's one ``car`` row (``row_of``, in any case): the
    same number, judged twice, never a different one."""
    detector, _, candidate = stored_pair
    verdict = verdicts.verdict_of(candidate)
    assert verdict.state == "pass", verdict.reasons
    values = dict(Outcome.objects.filter(version=candidate).values_list("class_name", "value"))
    assert values == {"Car": 1.0, "car": 1.0, "van": 1.0}


def test_the_pages_and_the_api_of_an_older_pair_do_not_fail(stored_pair, users, client):
    detector, split, candidate = stored_pair
    client.force_login(users["lead"])
    pages = [
        reverse("detector", args=[detector.pk]),
        reverse("suite", args=[detector.pk]),
        reverse("criteria", args=[detector.pk]),
        reverse("compare", args=[detector.pk]) + f"?candidate={candidate.pk}",
        reverse("version", args=[candidate.pk]),
        reverse("evidence", args=[candidate.pk]),
        reverse("evidence-json", args=[candidate.pk]),
        reverse("image-list", args=[candidate.pk]) + "?class=CAR",
        reverse("confusion", args=[candidate.pk]),
        "/",
    ]
    for url in pages:
        response = client.get(url)
        assert response.status_code == 200, (url, response.status_code)
    version_page = client.get(reverse("version", args=[candidate.pk])).content.decode()
    assert "Car" in version_page and "van" in version_page
    api = _api(users["lead"])
    for url in (
        f"/api/v1/detectors/{detector.pk}/",
        f"/api/v1/detectors/{detector.pk}/history/?class=Car",
        f"/api/v1/detectors/{detector.pk}/history/?class=car",
        f"/api/v1/versions/{candidate.pk}/results/",
        f"/api/v1/versions/{candidate.pk}/verdict/",
        f"/api/v1/versions/{candidate.pk}/evidence/",
    ):
        response = api.get(url)
        assert response.status_code == 200, (url, response.status_code, response.content[:300])
    out = io.StringIO()
    call_command("verify_audit", stdout=out)


def test_an_older_pair_is_resolved_through_set_classes_and_the_admin(
    stored_pair, users, run_tasks, client
):
    """Saving the pair unchanged in the admin names the field; dropping one spelling
    (the ``*`` rule names neither) is a new suite version, judged again."""
    detector, _, candidate = stored_pair
    _superuser(client)
    url, data = _admin_form(client, detector)
    response = client.post(url, data)
    assert response.status_code == 200
    assert "classes[1]: &#x27;car&#x27; is &#x27;Car&#x27; in another case" in (
        response.content.decode()
    )
    before = verdicts.verdict_of(candidate).judgement.suite.number
    url, data = _admin_form(client, detector, classes=json.dumps(["car", "van"]))
    response = run_tasks(client.post, url, data)
    assert response.status_code == 302
    detector.refresh_from_db()
    assert detector.classes == ["car", "van"]
    verdict = verdicts.verdict_of(candidate)
    assert verdict.state == "pass" and verdict.judgement.suite.number == before + 1


def test_an_older_pair_keeps_a_rules_exact_spelling(stored_pair):
    detector = stored_pair[0]
    rules = [
        {"class": c, "split": "*", "kind": "min_value", "threshold": 0.5} for c in ("car", "CAR")
    ]
    assert [r["class"] for r in criteria.validate_rules(detector, rules)] == ["car", "Car"]
