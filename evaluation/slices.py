"""One slice (image tag or size bucket) of a scorecard with every rule metric: the stored
rows, or, for rows stored before AP50, AP75 and recall were kept per slice, the values
computed from the scorecard's match records (a re-accumulation over the tag's images or
the size bucket, never a re-match: ``engine.slice_scores``)."""

from . import engine
from .models import SliceScore
from .protocols import resolve
from .services import load_records, load_truth_of
from .storage import ContentMismatch

#: Row column of each metric.
COLUMNS = {"AP": "ap", "AP50": "ap50", "AP75": "ap75", "recall": "recall"}


class SliceUnavailable(Exception):
    """The slice's metrics are neither stored nor computable (records file gone or
    altered); the message says why."""


def slice_values(card, kind, name, cache=None):
    """``{class name or "mean": {"AP": …, "AP50": …, "AP75": …, "recall": …}}`` of the
    slice ``kind`` ("tag" or "size") ``name`` of ``card``; None when the scorecard has
    no such slice (no image carries the tag, or the protocol has no such size bucket).

    Older rows (``all_metrics`` False) are completed from the match records once per
    ``cache`` (a dict the caller keeps for one judging or one page); their stored AP is
    kept as stored. ``SliceUnavailable`` when that is impossible.
    """
    key = (card.pk, kind, name)
    if cache is not None and key in cache:
        return cache[key]
    rows = list(SliceScore.objects.filter(scorecard=card, kind=kind, name=name))
    if not rows:
        values = None
    elif all(row.all_metrics for row in rows):
        values = {
            row.class_name or "mean": {m: getattr(row, c) for m, c in COLUMNS.items()}
            for row in rows
        }
    else:
        values = _from_records(card, kind, name)
        for row in rows:  # the stored AP stays the number of record
            values.setdefault(row.class_name or "mean", {})["AP"] = row.ap
    if cache is not None:
        cache[key] = values
    return values


def _from_records(card, kind, name):
    what = f"{kind} slice {name!r} of the scorecard of {card.evaluation.name}"
    try:
        records = load_records(card)
        protocol = resolve(card.protocol)
        if kind == "size":
            if name not in records.area_names[1:]:
                raise SliceUnavailable(f"{what}: its records have no size bucket {name!r}")
            weights, area = None, records.area_names.index(name)
        else:
            weights, area = load_truth_of(card.evaluation.split).tag_mask(name), 0
    except (ContentMismatch, engine.InputError, OSError, ValueError) as e:
        raise SliceUnavailable(
            f"{what} predates per-slice AP50/AP75/recall and its match records cannot be "
            f"read ({e}); score it again"
        ) from e
    result = engine.slice_scores(records, protocol, weights=weights, area=area)
    classes = result.pop("classes")
    return {"mean": result, **classes}
