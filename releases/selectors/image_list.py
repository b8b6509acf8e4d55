"""The per-image comparison of two versions on one split: filters, rows sorted by the
largest loss, neighbours for the drill-down's keyboard, and the link from a rule.

Counts and leave-one-image-out ΔAP come from the engine (``engine.per_image``) on the
stored records; nothing is matched again.
"""

from dataclasses import dataclass

import numpy as np

from evaluation import image_loo


@dataclass
class Listing:
    """The filters of the per-image list: a class (name or ``""`` for every class),
    an image tag, a size bucket (``""`` = all sizes) and the metric whose change ΔAP
    is (``AP``: the mean over the protocol's IoU slots; ``AP50`` / ``AP75``: one slot,
    as the rule the list was opened from)."""

    class_name: str = ""
    tag: str = ""
    size: str = ""
    metric: str = "AP"

    def query(self):
        return {
            k: v
            for k, v in (
                ("class", self.class_name),
                ("tag", self.tag),
                ("size", self.size),
                ("metric", "" if self.metric == "AP" else self.metric),
            )
            if v
        }

    def words(self):
        return ", ".join(f"{k} {v}" for k, v in self.query().items())


def listing_filters(params):
    """``Listing`` from request parameters (unknown values are checked against the
    split later, by ``image_rows``)."""
    return Listing(
        class_name=str(params.get("class", "") or "").strip()[:64],
        tag=str(params.get("tag", "") or "").strip()[:64],
        size=str(params.get("size", "") or "").strip()[:16],
        metric=str(params.get("metric", "") or "AP").strip()[:16],
    )


#: Metrics the list can rank by: ``None`` all slots, else the IoU of the one slot.
METRIC_IOU = image_loo.METRIC_IOU


def _slot(records, metric):
    if metric not in METRIC_IOU:
        raise ValueError(f"metric: {metric!r} is not one of {', '.join(METRIC_IOU)}")
    iou = METRIC_IOU[metric]
    if iou is None:
        return None
    slots = [t for t in range(records.n_slots) if float(records.thresholds[t, 0]) == iou]
    if not slots:
        raise ValueError(f"metric: {metric} needs an IoU slot of {iou}, which the protocol lacks")
    return slots[0]


def _area_index(records, size):
    if not size:
        return 0
    if size not in records.area_names:
        raise ValueError(
            f"size: {size!r} is not a size bucket ({', '.join(records.area_names[1:])})"
        )
    return records.area_names.index(size)


#: Leave-one-out arrays per (scorecard, records file, class, tag, size, slot): the list
#: of one class and the list of every class (their mean) share them, so each class's
#: leave-one-out runs once per process and filters; bounded (about 40 kB an entry at
#: 5,000 images).
_CLASS_LOO = {}
CLASS_LOO_ENTRIES = 512


def _class_loo(side, protocol, k, tag, weights, area, slot):
    from evaluation.engine import per_image

    key = (side.card.pk, side.card.records_sha256, k, tag, area, slot)
    found = _CLASS_LOO.get(key)  # .get: another thread may clear it meanwhile
    if found is None:
        found = per_image.leave_one_out(side.records, protocol, k, weights, area=area, slot=slot)
        if len(_CLASS_LOO) >= CLASS_LOO_ENTRIES:
            _CLASS_LOO.clear()
        _CLASS_LOO[key] = found
    return found


def _loo(side, protocol, classes, listing, weights, area, slot):
    """``(AP, AP without each image)`` of one class, or of the mean over the classes
    with positives (the headline mean: absent classes are left out of it): read from
    the leave-one-out file the worker stored with the scorecard (``image_loo``), else
    computed from the records, each class's arrays kept."""
    import warnings

    size = side.records.area_names[area]
    found = image_loo.stored(side.card, listing.metric, size, listing.tag)
    if found is not None:
        bases, without = found[0][classes], found[1][classes]
    else:
        pairs = [_class_loo(side, protocol, k, listing.tag, weights, area, slot) for k in classes]
        bases = np.array([ap for ap, _ in pairs])
        without = np.stack([w for _, w in pairs])
    if len(classes) == 1:
        return float(bases[0]), without[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # every class absent: NaN
        return float(np.nanmean(bases)), np.nanmean(without, axis=0)


_ROWS = {}


def image_rows(pair, listing):
    r"""The per-image comparison: for every image of the split that carries the tag
    (and, with a size, holds a counted box of that size or changes that size's AP),
    each version's TP, FP by reason and missed counts at the deployed threshold(s),
    and the image's contribution to the change in the class's ``listing.metric``
    (no class: the mean over classes) — in the chosen size bucket, when one is chosen
    (``AP_small`` …: boxes and detections outside it ignored, as the scorecard does):

    .. math:: c_i = \Delta - \Delta_{-i}, \quad \Delta = AP_{candidate} - AP_{reference}

    with the tag's images as 0/1 weights and image i at weight 0, exactly as the
    bootstrap weighs them (``engine.per_image.leave_one_out``); without a reference,
    the candidate's own AP change. Sorted by the largest loss first (most negative
    c_i; undefined ones last). Raises ``ValueError`` naming a bad filter."""
    from evaluation import engine
    from evaluation.engine import per_image
    from evaluation.engine.reasons import FALSE_POSITIVE_REASONS

    from ..class_thresholds import row_of, shared_note

    truth = pair.truth
    own = row_of(truth.classes, listing.class_name) if listing.class_name else None
    if listing.class_name and own is None:  # a detector's or rule's class, in any case
        shared = shared_note(truth.classes, listing.class_name)
        raise ValueError(
            f"class: {shared} on {pair.split}"
            if shared
            else f"class: {listing.class_name!r} is not a class of {pair.split}"
        )
    if listing.tag and listing.tag not in truth.tags():
        raise ValueError(f"tag: {listing.tag!r} is not an image tag of {pair.split}")
    records = pair.candidate.records
    area = _area_index(records, listing.size)
    slot = _slot(records, listing.metric)
    sides = {"candidate": pair.candidate}
    if pair.reference is not None:
        sides["reference"] = pair.reference
    key = (
        tuple((name, side.card.pk, side.card.records_sha256) for name, side in sides.items()),
        tuple(pair.thresholds.tolist()),
        own,
        listing.tag,
        listing.size,
        listing.metric,
    )
    cached = _ROWS.get(key)  # .get: another thread may clear it meanwhile
    if cached is not None:
        return cached
    k = truth.classes.index(own) if own is not None else None
    classes = [k] if k is not None else list(range(len(truth.classes)))
    weights = truth.tag_mask(listing.tag) if listing.tag else None
    protocol = engine.get_protocol(pair.protocol)
    counts, change, aps = {}, {}, {}
    for name, side in sides.items():
        counts[name] = per_image.image_counts(side.records, pair.thresholds, k)
        ap, without = _loo(side, protocol, classes, listing, weights, area, slot)
        change[name] = ap - without
        aps[name] = None if np.isnan(ap) else ap
    contribution = change["candidate"] - change.get("reference", 0.0)
    listed = np.ones(truth.n_images, bool) if weights is None else weights > 0
    if area:
        boxes = ~records.gt_ignored[area]
        if k is not None:
            boxes &= records.gt_class == k
        holds = np.bincount(records.gt_image[boxes], minlength=truth.n_images) > 0
        listed &= holds | (np.nan_to_num(contribution) != 0)
    chosen = np.flatnonzero(listed)
    value = contribution[chosen]
    order = chosen[np.lexsort((chosen, np.where(np.isnan(value), np.inf, value)))]
    if len(_ROWS) > 32:
        _ROWS.clear()
    result = {
        "order": order,
        "ap": aps,
        "contribution": contribution,
        "counts": counts,
        "reasons": [(r, SHORT_REASONS.get(r, r)) for r in FALSE_POSITIVE_REASONS],
    }
    _ROWS[key] = result
    return result


def neighbours(pair, listing, image):
    """Previous and next image of ``image`` in the filtered, sorted list, and its
    1-based position (None when it is not in the list)."""
    try:
        order = image_rows(pair, listing)["order"].tolist()
    except ValueError:
        order = []
    if image not in order:
        return {"previous": None, "next": None, "position": None, "total": len(order)}
    i = order.index(image)
    return {
        "previous": order[i - 1] if i > 0 else None,
        "next": order[i + 1] if i + 1 < len(order) else None,
        "position": i + 1,
        "total": len(order),
    }


def image_table(pair, listing, limit=200):
    """``image_rows`` for a page: the first ``limit`` rows (None: all) with ids, tags
    and counts."""
    rows = image_rows(pair, listing)
    truth = pair.truth
    out = []
    for i in rows["order"][:limit].tolist():
        entry = {
            "index": i,
            "id": str(truth.image_ids[i]),
            "tags": list(truth.image_tags[i]),
            "contribution": None
            if np.isnan(rows["contribution"][i])
            else float(rows["contribution"][i]),
        }
        for key, counts in rows["counts"].items():
            entry[key] = {name: int(values[i]) for name, values in counts.items()}
        out.append(entry)
    ap = rows["ap"]
    change = (
        ap["candidate"] - ap["reference"]
        if ap.get("reference") is not None and ap["candidate"] is not None
        else None
    )
    return {
        "rows": out,
        "total": len(rows["order"]),
        "reasons": rows["reasons"],
        "ap": ap,  # the listed images' AP of the chosen metric, each version (the base)
        "change": change,
    }


def threshold_words(pair):
    """The deployed threshold(s) in words: the most common cut, then the classes that
    differ (``score ≥ 0.50 (traffic_light ≥ 0.40)``)."""
    values = [float(t) for t in pair.thresholds]
    common = max(set(values), key=values.count)
    others = [f"{c} ≥ {t:.2f}" for c, t in zip(pair.classes, values) if t != common]
    return f"score ≥ {common:.2f}" + (f" ({', '.join(others)})" if others else "")


def slider_start(pair, class_name=""):
    """Where the drill-down's threshold slider starts: the class's deployed cut when
    the list is filtered to a class, else the most common cut."""
    from ..class_thresholds import row_of

    values = [float(t) for t in pair.thresholds]
    own = row_of(pair.classes, class_name) if class_name else None
    if own is not None:
        return values[pair.classes.index(own)]
    return max(set(values), key=values.count)


SHORT_REASONS = {
    "fp_localisation": "loc",
    "fp_class": "class",
    "fp_duplicate": "dup",
    "fp_localisation_and_class": "loc+class",
    "fp_background": "bg",
}


def rule_link(outcome, reference_id=None):
    """Query of the per-image list filtered to an outcome's split, class and tag or size
    bucket, ranked by the rule's metric (the one click from a failing rule): ``{"split",
    "class", "tag", "size", "metric", "against"}``."""
    query = {"split": outcome.split_id}
    if outcome.class_name and outcome.class_name not in ("mean", "*"):
        query["class"] = outcome.class_name
    tag = (outcome.rule or {}).get("tag")
    if tag:
        query["tag"] = tag
    size = (outcome.rule or {}).get("size")
    if size:
        query["size"] = size
    metric = (outcome.rule or {}).get("metric")
    if metric in METRIC_IOU and metric != "AP":
        query["metric"] = metric
    against = reference_id or outcome.baseline_id
    if against:
        query["against"] = against
    return query


def image_table_json(pair, listing, table):
    """The API's body of the per-image comparison."""
    return {
        "split": {"id": pair.split.pk, "name": pair.split.name, "revision": pair.split.revision},
        "protocol": pair.protocol,
        "candidate": {"id": pair.candidate.version.pk, "label": pair.candidate.version.label},
        "reference": None
        if pair.reference is None
        else {"id": pair.reference.version.pk, "label": pair.reference.version.label},
        "filters": listing.query(),
        "thresholds": dict(zip(pair.classes, (float(t) for t in pair.thresholds))),
        "fp_reasons": [r for r, _ in table["reasons"]],
        # The listed images' AP of the chosen class and metric, each version, and the
        # change (candidate minus reference): the page's summary line.
        "ap": table["ap"],
        "change": table["change"],
        "total": table["total"],
        "images": table["rows"],
    }
