"""The compare page says when two numbers of one protocol were computed differently
(the engine's protocol record: box policy, protocol or engine version, ...)."""

import json

import pytest
from django.urls import reverse

from evaluation import engine
from evaluation.models import Scorecard
from releases import services
from releases.selectors.compare import protocol_differences

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


def _card(result):
    return Scorecard(
        result=result,
        protocol_version=result["protocol_version"],
        engine_version=result["engine_version"],
    )


def test_differences_in_words_between_two_box_policies(tmp_path, split_truth):
    dets = detections_for(split_truth)
    for d in dets[:5]:
        d["bbox"][0] -= 2000  # wholly outside the frame on the left
    (tmp_path / "gt.json").write_text(json.dumps(split_truth))
    (tmp_path / "dt.json").write_text(json.dumps(dets))
    truth = engine.load_truth(tmp_path / "gt.json")
    keep = engine.evaluate(truth, engine.load_predictions(tmp_path / "dt.json", truth), "coco")
    clip = engine.evaluate(
        truth, engine.load_predictions(tmp_path / "dt.json", truth, boxes="clip"), "coco"
    )
    rows = protocol_differences(_card(keep), _card(clip))
    assert [r["setting"] for r in rows] == ["box policy"]
    assert (rows[0]["reference"], rows[0]["candidate"]) == ("keep", "clip")
    assert "clipping changes the IoU" in rows[0]["effect"]
    assert protocol_differences(_card(keep), _card(keep)) == []


def test_compare_page_shows_the_panel_when_settings_differ(
    client, users, detector, split, split_truth, run_tasks, monkeypatch
):
    """The reference was scored before results carried the protocol record; the panel
    says so rather than letting the delta pass as the detectors' difference."""
    real = engine.annotate

    def older(result, *args):  # as an engine without the protocol record wrote results
        real(result, *args)
        del result["protocol_record"]
        return result

    versions = []
    for i, label in enumerate(["2.0", "2.1"]):
        version = services.create_version(detector, label, users["engineer"])
        with monkeypatch.context() as patch:
            if i == 0:
                patch.setattr(engine, "annotate", older)
            run_tasks(
                services.submit_predictions,
                version,
                split,
                upload(f"{label}.json", detections_for(split_truth, seed=70 + i)),
                users["engineer"],
            )
        versions.append(version)
    client.force_login(users["engineer"])
    url = reverse("compare", args=[detector.pk])
    page = client.get(url, {"reference": versions[0].pk, "candidate": versions[1].pk})
    text = page.content.decode()
    assert page.status_code == 200
    assert f'id="protocol-differences-{split.pk}"' in text and "Computed differently" in text
    assert "none (older result)" in text
    # Two results with the same record: no panel.
    same = client.get(url, {"reference": versions[1].pk, "candidate": versions[1].pk})
    assert "protocol-differences-" not in same.content.decode()
