"""Scorecards and their rows, read for many prediction sets at once."""

METRICS = {  # metric key -> (ClassScore field, summary keys tried for the mean)
    "AP": ("ap", ("AP",)),
    "AP50": ("ap50", ("AP50",)),
    "AP75": ("ap75", ("AP75",)),
    "recall": ("recall", ("AR100", "recall")),
    "miss_rate": ("miss_rate", ()),
}


def _scorecards(prediction_sets, protocols, *, with_result=False):
    """Finished scorecards of these prediction sets: {(set id, protocol): Scorecard}.

    The full engine result (curves, slices) is large; it is loaded only when asked.
    """
    from evaluation.models import Scorecard

    by_input = {(ps.predictions_id, ps.split_id): ps for ps in prediction_sets}
    cards = Scorecard.objects.filter(
        evaluation__state="done",
        evaluation__protocol__in=protocols,
        evaluation__predictions_id__in={k[0] for k in by_input},
        evaluation__split_id__in={k[1] for k in by_input},
    ).select_related("evaluation")
    if not with_result:
        cards = cards.defer("result")
    out = {}
    for card in cards:
        ps = by_input.get((card.evaluation.predictions_id, card.evaluation.split_id))
        if ps is not None:
            out[(ps.pk, card.protocol)] = card
    return out


def _class_rows(cards):
    from evaluation.models import ClassScore

    rows = {}
    for row in ClassScore.objects.filter(scorecard__in=list(cards)):
        rows.setdefault(row.scorecard_id, {})[row.class_name] = row
    return rows


def _splits(ids):
    from evaluation.models import BenchmarkSplit

    return BenchmarkSplit.objects.filter(pk__in=ids).only("name", "revision")


def summary_items(summary):
    """A scorecard's summary in the engine's order (JSON columns may reorder keys)."""
    from evaluation.engine import COCO_SUMMARY_KEYS

    order = [*COCO_SUMMARY_KEYS, "recall"]  # other protocols use a subset of these
    rank = {key: i for i, key in enumerate(order)}
    return sorted(summary.items(), key=lambda item: (rank.get(item[0], len(order)), item[0]))


def class_numbers(row):
    """One ClassScore row as the API and the evidence report give it."""
    return {
        "class": row.class_name,
        "AP": row.ap,
        "AP50": row.ap50,
        "AP75": row.ap75,
        "recall": row.recall,
        "gt": row.gt,
        "tp": row.tp,
        "fp": row.fp,
        "best_f1": row.best_f1,
        "best_f1_threshold": row.best_f1_threshold,
        "miss_rate": row.miss_rate,
    }
