"""Every number the results API, the evidence report and a sign-off's evidence give
says how it was computed, as its stored result says: the protocol record (box policy
included), the engine version and the ground-truth fingerprint (red team audit15 F5).
A result stored by an older engine shows what it holds and says what it lacks."""

import pytest
from django.core.cache import cache
from rest_framework.test import APIClient

from evaluation import engine
from evaluation.models import Scorecard
from releases import services, tokens
from releases.audit import verify_audit
from releases.client import render
from releases.models import AuditEvent

from .conftest import detections_for, set_suite_policy, upload

pytestmark = pytest.mark.django_db

API = "/api/v1/"
PROVENANCE = ("engine_version", "truth_fingerprint", "protocol_sha256", "protocol_record")


def _client(user):
    cache.clear()  # throttle counters
    _, token = tokens.create_token(user, "tests")
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"Bearer {token}")
    return client


def _scored(detector, version, split, split_truth, users, run_tasks, policy):
    """The version's file scored under coco (primary) and voc with box ``policy``;
    returns {protocol: its Scorecard}."""
    if policy != "keep":
        set_suite_policy(detector, users["lead"], box_policy=policy)
    dets = detections_for(split_truth)
    for d in dets[::3]:  # a third of the boxes reach 20 px past the left edge
        d["bbox"][2] += d["bbox"][0] + 20.0
        d["bbox"][0] = -20.0
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", dets), users["engineer"]
    )
    cards = Scorecard.objects.filter(evaluation__prediction_sets__version=version)
    return {card.protocol: card for card in cards.select_related("evaluation")}


def _page(user, version):
    from django.test import Client

    client = Client()
    client.force_login(user)
    response = client.get(f"/versions/{version.pk}/")
    assert response.status_code == 200
    return response.content.decode()


def _assert_as_stored(given, card, policy):
    """``given`` holds the stored result's record, engine version and fingerprint."""
    for key in PROVENANCE:
        assert given[key] == card.result[key], key
    assert given["evaluation"] == card.evaluation_id
    assert given["box_policy"] == policy == card.result["protocol_record"]["box_policy"]
    assert given["not_recorded"] == {}
    assert given["truth_fingerprint"] == card.split_sha256  # a split frozen by this engine


@pytest.mark.parametrize("policy", ["keep", "clip"])
def test_results_evidence_and_sign_off_carry_each_stored_record(
    detector, version, split, split_truth, users, run_tasks, policy
):
    cards = _scored(detector, version, split, split_truth, users, run_tasks, policy)
    assert set(cards) == {"coco", "voc"}
    # The records differ where the protocols do (published definitions, common
    # practice): COCO's ten IoU slots 0.50:0.05:0.95 and no pixel offset, PASCAL VOC's
    # one slot at 0.5 and its +1 pixel convention.
    coco, voc = cards["coco"].result["protocol_record"], cards["voc"].result["protocol_record"]
    assert coco["iou_thresholds"] == pytest.approx([0.5 + 0.05 * i for i in range(10)])
    assert (voc["iou_thresholds"], coco["pixel_offset"], voc["pixel_offset"]) == ([0.5], 0, 1)
    if policy == "clip":  # the policy changed what was scored
        assert cards["coco"].result["counts"]["boxes"]["predictions"]["clipped"] > 0

    engineer = _client(users["engineer"])
    results = engineer.get(f"{API}versions/{version.pk}/results/").json()
    (entry,) = results["splits"]
    _assert_as_stored(entry, cards["coco"], policy)
    assert entry["protocol_version"] == cards["coco"].protocol_version
    assert entry["other_protocols"] == {"voc": cards["voc"].summary["AP"]}  # kept as it was
    assert set(entry["other_protocols_provenance"]) == {"voc"}
    _assert_as_stored(entry["other_protocols_provenance"]["voc"], cards["voc"], policy)

    evidence = engineer.get(f"{API}versions/{version.pk}/evidence/").json()
    (scored,) = evidence["splits"]
    _assert_as_stored(scored, cards["coco"], policy)
    assert scored["other_protocols"] == entry["other_protocols"]
    _assert_as_stored(scored["other_protocols_provenance"]["voc"], cards["voc"], policy)
    html = engineer.get(f"{API}versions/{version.pk}/evidence/", {"format": "html"})
    text = html.content.decode()
    assert f"boxes {policy}" in text and cards["coco"].result["truth_fingerprint"] in text

    # The version page's provenance names the box policy and links the full record.
    page = _page(users["engineer"], version)
    assert f'<dd class="box-policy">{policy}</dd>' in page
    assert f'href="{API}evaluations/{cards["coco"].evaluation_id}/result/"' in page

    # The pipeline client prints a line per protocol saying so.
    lines = render.provenance_lines(results)
    engine_version = cards["coco"].result["engine_version"]
    assert lines == [
        f"bay-night rev 1: {p} v{cards[p].protocol_version}, boxes {policy}, "
        f"engine {engine_version}"
        for p in ("coco", "voc")
    ]

    # The lead signs on the evidence: the decision keeps each evaluation's record.
    record, event = services.sign_off(version, users["lead"], "approved", "fine at night")
    kept = {e["protocol"]: e for e in record.evidence["evaluations"]}
    assert set(kept) == {"coco", "voc"}
    for protocol, card in cards.items():
        _assert_as_stored(kept[protocol], card, policy)
        assert kept[protocol]["AP"] == card.summary["AP"]
    assert AuditEvent.objects.get(pk=event.pk).payload["evidence"] == record.evidence
    assert verify_audit()[0] is None
    # ... and the evidence report shows it with the decision.
    after = engineer.get(f"{API}versions/{version.pk}/evidence/").json()
    assert after["sign_off"]["decision"] == "approved"
    assert after["splits"][0]["protocol_record"] == coco


def test_a_result_of_an_older_engine_shows_what_it_holds_and_says_what_it_lacks(
    detector, version, split, split_truth, users, run_tasks, monkeypatch
):
    """Stored as an engine before the protocol record, the fingerprint and the digest
    wrote results: the keys are null and ``not_recorded`` says why; the box policy is
    the evaluation's own, said so. Nothing is invented."""
    real = engine.annotate

    def older(result, *args):  # as an engine before 2.4.0 wrote results
        real(result, *args)
        for key in ("protocol_record", "truth_fingerprint", "protocol_sha256"):
            del result[key]
        return result

    with monkeypatch.context() as patch:
        patch.setattr(engine, "annotate", older)
        cards = _scored(detector, version, split, split_truth, users, run_tasks, "keep")
    assert "protocol_record" not in cards["coco"].result

    engineer = _client(users["engineer"])
    (entry,) = engineer.get(f"{API}versions/{version.pk}/results/").json()["splits"]
    (scored,) = engineer.get(f"{API}versions/{version.pk}/evidence/").json()["splits"]
    record, _ = services.sign_off(version, users["lead"], "approved", "older numbers")
    kept = {e["protocol"]: e for e in record.evidence["evaluations"]}
    for given in (entry, entry["other_protocols_provenance"]["voc"], scored, *kept.values()):
        assert (given["protocol_record"], given["truth_fingerprint"]) == (None, None)
        assert given["protocol_sha256"] is None
        assert set(given["not_recorded"]) == {
            "protocol_record",
            "truth_fingerprint",
            "protocol_sha256",
            "box_policy",
        }
        assert "since engine 2.4.0" in given["not_recorded"]["protocol_record"]
        assert given["box_policy"] == "keep"  # the evaluation's column
        assert "the evaluation's own policy" in given["not_recorded"]["box_policy"]
        assert given["engine_version"] == cards["coco"].engine_version
    page = _page(users["engineer"], version)
    assert "the evaluation&#x27;s own policy" in page and "since engine 2.4.0" in page
    line = render.provenance_lines({"splits": [entry]})[0]
    assert "protocol_record: the stored result" in line
