"""A scorecard's per-class and per-slice rows, from the engine's result (plain SQL reads)."""

from .levels import is_levels, level_rows
from .models import ClassScore, SliceScore


def _mean_of(rows, key):
    present = [row[key] for row in rows if row.get(key) is not None]
    return sum(present) / len(present) if present else None


def class_rows(scorecard, result):
    """One row per class, plus the mean row (class_name ''): the protocol's own means
    where it has them, else the mean over present classes."""
    if is_levels(result):
        return  # a level protocol's numbers are its level rows (slice_rows)
    summary, rows = result["summary"], list(result["per_class"].values())

    def first(*keys):
        return next((summary[k] for k in keys if summary.get(k) is not None), None)

    yield ClassScore(
        scorecard=scorecard,
        class_name="",
        ap=summary.get("AP"),
        ap50=first("AP50") if "AP50" in summary else _mean_of(rows, "AP50"),
        ap75=first("AP75") if "AP75" in summary else _mean_of(rows, "AP75"),
        recall=first("AR100", "recall"),
        gt=sum(row["gt"] for row in rows),
        tp=sum(row["tp"] for row in rows),
        fp=sum(row["fp"] for row in rows),
        miss_rate=_mean_of(rows, "miss_rate"),
    )
    for name, row in result["per_class"].items():
        best = row.get("best_f1") or {}
        yield ClassScore(
            scorecard=scorecard,
            class_name=name,
            ap=row["AP"],
            ap50=row.get("AP50"),
            ap75=row.get("AP75"),
            recall=row["recall"],
            gt=row["gt"],
            tp=row["tp"],
            fp=row["fp"],
            best_f1=best.get("f1"),
            best_f1_threshold=best.get("threshold"),
            miss_rate=row["miss_rate"],
        )


def slice_rows(scorecard, result):
    """One row per slice and class (plus the mean row, class_name ''), with every rule
    metric when the result has them (``classes``: results from engine 1.x before
    per-slice metrics have AP only and give rows with ``all_metrics`` False)."""
    if is_levels(result):
        yield from level_rows(scorecard, result)
        return
    for kind, slices in result["slices"].items():
        for name, entry in slices.items():
            complete = "classes" in entry
            rows = [("", entry)]
            if complete:
                rows += list(entry["classes"].items())
            else:
                rows += [(c, {"AP": ap}) for c, ap in entry["per_class"].items()]
            for class_name, metrics in rows:
                yield SliceScore(
                    scorecard=scorecard,
                    kind=kind,
                    name=name,
                    class_name=class_name,
                    ap=metrics["AP"],
                    ap50=metrics.get("AP50"),
                    ap75=metrics.get("AP75"),
                    recall=metrics.get("recall"),
                    all_metrics=complete,
                    images=entry.get("images"),
                )
