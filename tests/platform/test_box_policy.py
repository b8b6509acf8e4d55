"""The box policy travels from the request to the engine: one evaluation per
(split, file, protocol, policy), scored under that policy, refusals stored as failures."""

import json

import pytest

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import Evaluation, Scorecard

from .conftest import upload

pytestmark = pytest.mark.django_db


def _overhanging_file(split_truth):
    """One detection per ground-truth box, stretched 20 px past the left edge of the
    frame: kept as given it overlaps less than when clipped."""
    dets = []
    for ann in split_truth["annotations"]:
        x, y, w, h = ann["bbox"]
        dets.append(
            {
                "image_id": ann["image_id"],
                "category_id": ann["category_id"],
                "bbox": [-20.0, y, x + w + 20.0, h],
                "score": 0.9,
            }
        )
    return dets


def test_each_policy_is_its_own_evaluation_scored_under_it(split, split_truth, run_tasks):
    stored = evaluation_services.store_predictions(
        upload("edge.json", _overhanging_file(split_truth))
    )
    by_policy = {}
    for policy in engine.BOX_POLICIES:
        (evaluation,) = run_tasks(
            evaluation_services.request_evaluations, split, stored, ["coco"], box_policy=policy
        )
        evaluation.refresh_from_db()
        by_policy[policy] = evaluation
    # The same request again reuses the evaluation (part of the unique key).
    again = evaluation_services.request_evaluations(split, stored, ["coco"], box_policy="clip")
    assert again[0].pk == by_policy["clip"].pk
    assert Evaluation.objects.filter(predictions=stored).count() == 3

    keep, clip = (Scorecard.objects.get(evaluation=by_policy[p]) for p in ("keep", "clip"))
    assert keep.result["counts"]["boxes"]["policy"] == "keep"
    # Every stored number says under which exact protocol it was computed.
    for card, policy in ((keep, "keep"), (clip, "clip")):
        assert card.result["protocol_record"]["box_policy"] == policy
        assert card.result["protocol_record"]["name"] == "coco"
        assert card.result["truth_fingerprint"] == split.sha256
    assert clip.result["counts"]["boxes"]["predictions"]["clipped"] > 0
    assert keep.summary["AP"] != clip.summary["AP"]  # clipping changed IoU

    rejected = by_policy["reject"]
    assert rejected.state == "failed"
    assert "box policy: reject" in rejected.error and "record" in rejected.error
    assert not Scorecard.objects.filter(evaluation=rejected).exists()


def test_an_unknown_policy_is_refused_before_anything_is_stored(split, split_truth):
    stored = evaluation_services.store_predictions(upload("p.json", []))
    with pytest.raises(engine.InputError, match="unknown box policy 'trim'"):
        evaluation_services.request_evaluations(split, stored, ["coco"], box_policy="trim")
    assert not Evaluation.objects.exists()


def test_reject_names_the_record_of_a_split_whose_annotations_needed_resolving(
    split_truth, run_tasks
):
    """A split with a repeated annotation id (read as pycocotools' index reads it: the
    last one) and a box over the frame's edge: under ``reject`` the evaluation fails
    naming that annotation, as the command line does, instead of an internal error."""
    truth = json.loads(json.dumps(split_truth))
    image = truth["images"][0]
    twin = {**truth["annotations"][0], "image_id": image["id"]}
    twin["bbox"] = [image["width"] - 5.0, 1.0, 20.0, 10.0]
    truth["annotations"] += [twin, dict(twin)]  # same id twice: the last one is scored
    resolved = evaluation_services.load_split(
        name="dock-dusk", revision=1, truth=upload("dock-dusk.json", truth)
    )
    stored = evaluation_services.store_predictions(upload("p.json", []))
    (evaluation,) = run_tasks(
        evaluation_services.request_evaluations, resolved, stored, ["coco"], box_policy="reject"
    )
    evaluation.refresh_from_db()
    assert evaluation.state == "failed"
    last = len(truth["annotations"]) - 1
    assert f"annotations[{last}]" in evaluation.error and "box policy: reject" in evaluation.error
