"""One call from arrays to a scorecard."""

from .matching import match
from .protocols import get_protocol
from .provenance import annotate, counts
from .scorecard import score_records


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
    records for re-weighting, with their reasons) come from it. See ``score_records``
    for the layout.
    """
    protocol = get_protocol(protocol)
    records = match(truth, predictions, protocol, reasons=return_records)
    tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()} if tag_slices else None
    result = score_records(
        records, protocol, weights=weights, tag_masks=tag_masks, score_threshold=score_threshold
    )
    annotate(result, truth, predictions, records, protocol)  # counts, protocol record
    return (result, records) if return_records else result


__all__ = ["annotate", "counts", "evaluate"]
