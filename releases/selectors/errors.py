"""Kinds of error: TIDE's ΔAP per error type for a version (and its reference) on each
split, and the confusion matrix at the deployed thresholds with a cell's members.

All from the stored reasons of the match records (``engine.tide``,
``engine.confusion``); kept per records file in the process, since a stored file never
changes.
"""

import numpy as np

from evaluation.storage import ContentMismatch

from .cause import NotScored, _side, default_reference

# How each TIDE error type reads on a page (Bolya et al., ECCV 2020, section 2.2).
ERROR_WORDS = {
    "classification": "right place, wrong class",
    "localisation": "right class, box off (IoU between 0.1 and the threshold)",
    "both": "wrong class and box off",
    "duplicate": "a second detection of a found object",
    "background": "nothing there (IoU < 0.1 with every box)",
    "missed": "an object no detection points at",
}


_BREAKDOWNS = {}


def breakdown_of(side):
    """``engine.tide.error_breakdown`` of one version's scorecard on a split: stored at
    scoring time (``evaluation.breakdowns``; an older scorecard's computed once and
    stored), kept per records file in the process."""
    from evaluation import breakdowns

    card = side.card
    key = (card.pk, card.records_sha256)
    found = _BREAKDOWNS.get(key)  # .get: another thread may clear it meanwhile
    if found is None:
        found = breakdowns.breakdown_of(card)
        if len(_BREAKDOWNS) > 64:
            _BREAKDOWNS.clear()
        _BREAKDOWNS[key] = found
    return found


def _rows(candidate, reference, types):
    rows = []
    for error in types:
        c = candidate["delta"].get(error)
        r = reference["delta"].get(error) if reference else None
        rows.append(
            {
                "type": error,
                "words": ERROR_WORDS.get(error, ""),
                "candidate": c,
                "reference": r,
                "change": None if c is None or r is None else c - r,
                "candidate_count": candidate.get("count", {}).get(error),
                "reference_count": reference.get("count", {}).get(error) if reference else None,
            }
        )
    return rows


def compare_breakdowns(candidate, reference):
    """Rows for a page: per error type, each version's ΔAP (mean over classes), the
    change, the counts; ``grew``: the type whose ΔAP grew most (None when none grew)."""
    types = candidate["types"]
    mean = _rows(candidate["mean"], reference["mean"] if reference else None, types)
    per_class = {}
    for name, entry in candidate["per_class"].items():
        other = reference["per_class"].get(name) if reference else None
        if entry["AP"] is None:
            continue
        per_class[name] = _rows(entry, other if other and other["AP"] is not None else None, types)
    changes = [(r["change"], r["type"]) for r in mean if r["change"] is not None]
    grew = max(changes) if changes else None
    return {
        "types": types,
        "mean": mean,
        "per_class": per_class,
        "grew": grew[1] if grew and grew[0] > 0 else None,
        "class_grew": _class_grew(per_class),
    }


NOTABLE = 0.005  # half an AP point: below it, no class is named as having grown


def _class_grew(per_class, shown=3):
    """The classes whose one error type's ΔAP grew most (by at least ``NOTABLE``):
    ``[(class, type, change)]``, largest first."""
    out = []
    for name, rows in per_class.items():
        changes = [(r["change"], r["type"]) for r in rows if r["change"] is not None]
        if changes and max(changes)[0] >= NOTABLE:
            change, error = max(changes)
            out.append((name, error, change))
    return sorted(out, key=lambda t: -t[2])[:shown]


def pair_breakdown(pair, class_name=""):
    """Kinds of error of the pair on its split for one class (``""``: the mean over
    classes), candidate against reference: ``{"rows": compare_breakdowns rows, "grew":
    the type whose ΔAP grew most or None}``; ``{"error": text}`` when a records file
    fails its check; None for a class without ground truth on the split (no AP)."""
    try:
        candidate = breakdown_of(pair.candidate)
        reference = breakdown_of(pair.reference) if pair.reference is not None else None
    except (ContentMismatch, OSError, ValueError) as e:  # shown in place, not a 500
        return {"error": str(e)}
    found = compare_breakdowns(candidate, reference)
    from ..class_thresholds import of_class

    rows = of_class(found["per_class"], class_name) if class_name else found["mean"]
    if rows is None:
        return None
    changes = [(r["change"], r["type"]) for r in rows if r["change"] is not None]
    grew = max(changes) if changes else None
    return {"rows": rows, "grew": grew[1] if grew and grew[0] > 0 else None}


def version_breakdowns(version, reference=None):
    """Per scored split of ``version``: the error breakdown of its primary scorecard
    and of ``reference``'s (default: the judged baseline) on the same split."""
    from .cause import scored_splits

    reference = reference if reference is not None else default_reference(version)
    out = []
    for split in scored_splits(version):
        try:
            candidate = _side(version, split)
        except NotScored:
            continue
        other = None
        if reference is not None and reference.pk != version.pk:
            try:
                other = _side(reference, split)
            except NotScored:
                other = None
        entry = {"split": split, "reference": other.version if other else None}
        try:
            entry.update(
                compare_breakdowns(breakdown_of(candidate), breakdown_of(other) if other else None)
            )
        except (ContentMismatch, OSError, ValueError) as e:  # shown in place, not a 500
            entry["error"] = str(e)
        out.append(entry)
    return out


def confusion_for(pair, row=None, column=None, limit=500):
    """The confusion matrix of the pair's candidate at the deployed thresholds (rows
    truth, columns prediction, background last; counts and row-normalised), and, when
    a cell is chosen, its detections (with image, score, reason, IoU) and missed boxes."""
    from evaluation.engine import confusion
    from evaluation.engine.reasons import DETECTION_REASONS

    records = pair.candidate.records
    matrix = confusion.confusion_matrix(records, pair.thresholds)
    size = len(matrix["labels"])
    cell = None
    if row is not None and column is not None and 0 <= row < size and 0 <= column < size:
        members = confusion.cell_members(records, pair.thresholds, row, column)
        truth = pair.truth
        detections = members["detections"]
        detections = detections[np.argsort(-records.det_score[detections], kind="stable")]
        cell = {
            "row": matrix["labels"][row],
            "column": matrix["labels"][column],
            "total": len(detections) + len(members["boxes"]),
            "detections": [
                {
                    "image": int(records.det_image[d]),
                    "image_id": str(truth.image_ids[records.det_image[d]]),
                    "class": records.classes[records.det_class[d]],
                    "score": float(records.det_score[d]),
                    "reason": DETECTION_REASONS[records.det_reason[d]],
                    "iou": None
                    if np.isnan(records.det_ref_iou[d])
                    else float(records.det_ref_iou[d]),
                }
                for d in detections[:limit]
            ],
            "boxes": [
                {
                    "image": int(truth.box_image[b]),
                    "image_id": str(truth.image_ids[truth.box_image[b]]),
                    "class": truth.classes[truth.box_class[b]],
                    "box": [round(float(v), 1) for v in truth.boxes[b]],
                }
                for b in members["boxes"][:limit]
            ],
        }
    return {"matrix": matrix, "cell": cell}


def confusion_pair(user, candidate, reference, split):
    """Both versions' confusion matrices on ``split`` for the compare page, in one class
    order (the split's) at the same deployed thresholds and primary IoU: per side the
    version, counts and row-normalised shares (``engine.confusion``); the reference side
    is None when it was not scored there. Raises what ``cause.pair_for`` raises."""
    from evaluation.engine import confusion

    from .cause import pair_for
    from .image_list import threshold_words

    pair = pair_for(user, candidate.pk, split.pk, against=reference.pk)
    sides = []
    for side in (pair.reference, pair.candidate):
        if side is None:
            sides.append(None)
            continue
        matrix = confusion.confusion_matrix(side.records, pair.thresholds)
        sides.append(
            {
                "version": side.version,
                "counts": matrix["counts"],
                "row_normalised": matrix["row_normalised"],
            }
        )
    labels = [*pair.candidate.records.classes, "background"]  # confusion_matrix's order
    return {"labels": labels, "thresholds": threshold_words(pair), "sides": sides}
