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

    Read through each set's own evaluations (``PredictionSet.evaluations``), never by
    file and split: another team's scorecard of identical bytes is not this set's. The
    full engine result (curves, slices) is large; it is loaded only when asked.
    """
    from evaluation.models import Scorecard

    from ..models import PredictionSet

    links = PredictionSet.evaluations.through.objects.filter(
        predictionset_id__in=[ps.pk for ps in prediction_sets],
        evaluation__state="done",
        evaluation__protocol__in=protocols,
    ).values_list("predictionset_id", "evaluation_id")
    links = list(links)
    cards = Scorecard.objects.filter(evaluation_id__in={e for _, e in links}).select_related(
        "evaluation"
    )
    if not with_result:
        cards = cards.defer("result")
    by_evaluation = {card.evaluation_id: card for card in cards}
    out = {}
    for set_id, evaluation_id in links:
        card = by_evaluation.get(evaluation_id)
        if card is not None:
            out[(set_id, card.protocol)] = card
    return out


def class_row(rows, name):
    """The row of ``rows`` (``_class_rows``: one card's, by the split's names) for a
    detector's class ``name``, matched in any case (``class_thresholds.row_of``)."""
    from ..class_thresholds import of_class

    return of_class(rows, name)


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


def absent_classes(card, classes):
    """``(class, why)`` for each of ``classes`` the scorecard has no AP for, in the
    engine's words (``protocol_record.absent_classes``: no counted box, every detection
    ignored under ``voc07``, ...); needs the card's result. Empty for a result recorded
    before the record (engine 2.4.0)."""
    from ..class_thresholds import row_of

    record = card.result.get("protocol_record") or {}
    why = record.get("absent_classes") or {}
    found = [(name, row_of(why, name)) for name in classes]  # the split's spelling, any case
    return [(name, why[key]) for name, key in found if key is not None]


def absent_reasons(card, cache):
    """``{class: why}`` for every class the scorecard has no AP for, in the engine's
    words (``protocol_record.absent_classes``), read without loading the rest of its
    result; ``cache`` keeps one card's reasons."""
    from evaluation.models import Scorecard

    key = ("absent", card.pk)
    if key not in cache:
        found = (
            Scorecard.objects.filter(pk=card.pk)
            .values_list("result__protocol_record__absent_classes", flat=True)
            .first()
        )
        cache[key] = found if isinstance(found, dict) else {}
    return cache[key]


def absent_reason(card, name, cache):
    """Why the scorecard has no AP for class ``name`` (``absent_reasons``), or None."""
    from ..class_thresholds import row_of

    reasons = absent_reasons(card, cache)
    return reasons.get(row_of(reasons, name))


def absent_note(card, name, cache):
    """``" (why)"``: ``absent_reason`` as a note ("" when there is none)."""
    why = absent_reason(card, name, cache)
    return f" ({why})" if why else ""


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
