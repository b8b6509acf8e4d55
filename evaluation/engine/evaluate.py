"""One call from arrays to a scorecard."""

from .matching import match
from .protocols import get_protocol
from .scoring import score_records


def evaluate(
    truth,
    predictions,
    protocol="coco",
    *,
    weights=None,
    score_threshold=0.5,
    tag_slices=True,
    return_records=False,
):
    """Score ``predictions`` against ``truth`` under ``protocol``.

    Matching happens once; the scorecard (and, with ``return_records``, the match
    records for re-weighting) come from it. See ``score_records`` for the layout.
    """
    protocol = get_protocol(protocol)
    records = match(truth, predictions, protocol)
    tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()} if tag_slices else None
    result = score_records(
        records, protocol, weights=weights, tag_masks=tag_masks, score_threshold=score_threshold
    )
    result["counts"] = counts(truth, predictions, records)
    return (result, records) if return_records else result


def counts(truth, predictions, records):
    """What was scored: images, boxes, predictions read, scored, clipped, dropped, and
    what the box policy found (boxes out of frame, wholly outside, zero-area)."""
    return {
        "images": truth.n_images,
        "truth_boxes": truth.n_boxes,
        "predictions": len(predictions),
        "scored_predictions": records.n_detections,
        "clipped_predictions": predictions.clipped,
        "dropped_predictions": predictions.dropped,
        "boxes": {
            "policy": predictions.box_policy,
            "truth": dict(truth.box_counts),
            "predictions": dict(predictions.box_counts),
        },
    }
