"""Integer scores float64 cannot hold, and the order pycocotools 2.0.11 gives them.

The engine reads every score as float64. pycocotools keeps a JSON integer as a Python
``int`` and lets numpy pick each array's type from the values in it (numpy 2 value-based
discovery: Python ints within int64 make int64, all in [2**63, 2**64) uint64, an int
beyond those an object array of exact Python numbers; any float with ints of int64 or
uint64 range makes float64, the ints rounded; an empty list float64):

* ``COCOeval.evaluateImg`` (and ``computeIoU``) ranks an image's detections of a class
  with ``np.argsort([-d['score'] for d in dt], kind='mergesort')``: one list per (image,
  class), exact unless it is float64;
* ``COCOeval.accumulate`` joins the images' capped lists with
  ``np.concatenate([e['dtScores'][0:maxDet] for e in E])`` — each list converted on its
  own, an image with ground truth and no detection of the class an empty float64 list —
  and sorts ``-dtScores`` with ``kind='mergesort'`` in the joined type (int64 and uint64
  negation wrap around, a boolean array cannot be negated: pycocotools then raises).

So integers beyond 2**53 that float64 ties or rounds can be ordered exactly there, and
scored differently from the engine's float64 order. ``check`` finds whether that happens
on a file: only a file holding a score of magnitude >= 2**53 (``suspect``) is read a
second time, loosely, and each class holding one is replayed with pycocotools' own numpy
calls on the exact values, at the caps 100 (``coco``) and none (``recall40``). Where
that order (per image, capped, or per class) differs from the engine's, the class's
order is kept for scoring: each detection's rank within its image (``evaluateImg``'s
full argsort: the cap keeps ranks below it, matching walks them in that order) and an
order key (``order_keys``: the dense rank of what ``accumulate`` sorted, so the class
order is key, then image, then rank — the stable sort of the joined lists). Matching
(``accumulation_order.orders``) and ``MatchRecords.det_key`` carry it into every later
step; the shown scores and every threshold keep the float64 value. A protocol with
another cap cannot use it and raises the entry's refusal, naming the record. Where the
orders agree no order is kept. Integers beyond float64's range, which its ``accumulate``
cannot write into its float64 score array, stop its precision fill there
(``beyond_float64``): their detections are listed for ``average_precision.fill_stops``.

The CityPersons script (``eval_MR_multisetup.py``, preset ``miss-rate-cityscale``) is a
pycocotools derivative that reads JSON with Python's ``json`` and makes the same numpy
calls with its own cap and a height filter: ``evaluateImg`` argsorts an image's
detections, keeps the first 1,000, *then* drops those outside the setup's expanded
height range; ``accumulate`` concatenates the kept lists of category id 1 (an image
with a box and no kept detection gives an empty float64 list). ``check`` replays that
exactly for each distinct height range of the setups (the file's own ``bbox[3]``, as
the script's ``loadRes`` sets ``height``), under the key ``"cityscale"``: the ranks and
one order key list per height range, which ``pedestrian.evaluate_setups`` and the
setups' samples (``level_samples``) take.
"""

import numpy as np

from ..pedestrian_setups import CITYSCALE_HEIGHT_RANGES, HEIGHT_EXPANSION, category_one
from . import beyond_float64, checks
from .loose_scores import _BOOL, _INT, _affected, suspect

#: The per-image caps checked: pycocotools' ``maxDets[-1]`` (coco) and none (recall40).
CAPS = (100, None)

#: The CityPersons script's per-image cap (``maxDets = [1000]``).
CITYSCALE_CAP = 1000
CITYSCALE = "cityscale"
_PYCOCOTOOLS = "pycocotools 2.0.11"
_CITY_SCRIPT = "the CityPersons script (eval_MR_multisetup.py)"
#: What a refusal says: pycocotools' order is taken for the caps checked, so its
#: refusal is raised only under another cap; the CityPersons script's is not taken.
_TAILS = {
    _PYCOCOTOOLS: (
        "its order is taken for the per-image caps 100 and none only (replayed when "
        "the file is read), so the file is refused for a protocol with another cap"
    ),
    _CITY_SCRIPT: (
        f"this protocol's numbers would differ from those of {_CITY_SCRIPT}, so the file "
        "is refused for this protocol"
    ),
}


def cap_values(path, truth, wide):
    """``uncompared.ranks``' ``exact`` for the JSON detections file at ``path``: given
    detections (``records``: rows of the file as laid out for loading — ``_affected``'s
    ``row`` —, ``group`` = image * classes + class, float64 ``score``),
    None when no group holds a ``suspect`` score (nothing is read), else the rows of
    the groups holding one and the Python scores pycocotools holds for them (the file
    read loosely, ``_affected``, for those groups' classes only)."""

    def exact(records, group, score):
        held = np.isin(group, group[suspect(score)])
        if not held.any():
            return None
        rows = np.flatnonzero(held)
        classes = np.unique(group[rows] % len(truth.classes)).tolist()
        found, big = _affected(path, truth, classes, wide)
        return rows, _values(found, big, np.searchsorted(found["row"], records[rows]))

    return exact


def check(path, truth, classes, wide, boxes=False):
    """``{cap_key: {} or entry}`` for ``CAPS`` and ``"cityscale"`` — empty when
    ``classes`` (the classes holding a ``suspect`` score) is empty — of the JSON
    detections file at ``path``. Only a class holding an integer of magnitude >= 2**53
    is replayed: without one, every list numpy makes of it ranks as float64 does.

    An entry of a cap says where pycocotools' order first differs from float64's
    (``path``, ``record``, ``field``, ``message``: what a protocol that cannot take the
    exact order raises) and carries that order for every detection of each class
    where it differs (``position``: index into the loaded predictions, ``rank``:
    pycocotools' rank within its image and class, ``key``: ``order_keys``). The
    ``"cityscale"`` entry (``_cityscale``) carries one key list per height range of
    the setups, which ``pedestrian.evaluate_setups`` takes.

    An entry may also carry ``"overflow"``: the refusal of a file holding integers
    beyond float64's range in a box pycocotools meets (``beyond_float64``; boxes of
    every class when ``boxes``: a loaded box is infinite). The detections whose score
    is such an integer are listed under ``beyond_float64.OVERFLOWING``
    (``{"position": [...]}``): pycocotools' precision fill stops at them."""
    if not len(classes) and not boxes:
        return {}
    rows, big = _affected(path, truth, range(len(truth.classes)) if boxes else classes, wide)
    seen = _looked_up(truth, rows)
    replayed = np.unique(seen["cls"][np.isin(seen["record"], list(big))]).tolist()
    conflicts = {}
    for cap in CAPS:
        found = [_replay(path, truth, _of_class(seen, k), big, k, cap) for k in replayed]
        conflicts["none" if cap is None else str(cap)] = _joined([f for f in found if f])
    conflicts[CITYSCALE] = _cityscale(path, truth, seen, big, replayed)
    refusals = beyond_float64.refusals(path, truth, rows, big, CAPS, boxes, _values)
    for cap, refusal in refusals.items():  # refused under that cap (``score_conflict``)
        key = "none" if cap is None else str(cap)
        conflicts[key] = {**conflicts[key], beyond_float64.OVERFLOW: refusal}
    overflowing = beyond_float64.overflowing(rows, big)
    if overflowing:  # where pycocotools' precision fill stops (``average_precision.fill_stops``)
        conflicts[beyond_float64.OVERFLOWING] = overflowing
    return conflicts


def _looked_up(truth, rows):
    """``rows`` less the detections ``evaluate`` never looks up (``GroundTruth.
    looked_up``): on an image, or of a category's own id, that ``np.unique`` loses.
    ``_dts[img, catId]`` of a lost category's entry holds only the detections written
    with the value numpy changed its id into (``alias``), so only they are ranked
    there, among themselves: one list, typed by numpy from their values alone."""
    seen = truth.looked_up(rows["image"], rows["cls"], rows["alias"])
    return rows if seen.all() else {name: column[seen] for name, column in rows.items()}


def _of_class(rows, k):
    return {n: v[rows["cls"] == k] for n, v in rows.items()}


def _joined(entries):
    """One entry of several classes' entries: the first one's refusal, all orders."""
    if not entries:
        return {}
    out = dict(entries[0])
    for name in ORDER_FIELDS:
        out[name] = [v for e in entries for v in e[name]]
    return out


#: The order columns of an entry (``check``).
ORDER_FIELDS = ("position", "rank", "key")


def restrict(conflicts, positions):
    """``conflicts`` (``check``) for the predictions ``positions`` of the loaded ones
    (ascending), as ``shards.predictions_slice`` cuts them: order columns narrowed to
    those detections and their positions made the slice's own."""
    if not conflicts:
        return conflicts
    out = {}
    for key, entry in conflicts.items():
        if not entry or "position" not in entry:
            out[key] = entry
            continue
        position = np.asarray(entry["position"], np.int64)
        at = np.searchsorted(positions, position)
        inside = at < len(positions)
        inside[inside] = positions[at[inside]] == position[inside]
        narrowed = dict(entry, position=at[inside].tolist())
        if key == beyond_float64.OVERFLOWING:  # positions only (kept, maybe empty)
            out[key] = narrowed
            continue
        narrowed["rank"] = np.asarray(entry["rank"], np.int64)[inside].tolist()
        if "key" in entry:
            narrowed["key"] = np.asarray(entry["key"], np.int64)[inside].tolist()
        else:  # the cityscale entry: one key list per height range
            narrowed["keys"] = [
                None if keys is None else np.asarray(keys, np.int64)[inside].tolist()
                for keys in entry["keys"]
            ]
        out[key] = narrowed
    return out


def _cityscale(path, truth, rows, big, replayed):
    """The CityPersons script's order (category id 1 only, cap 1,000 per image, then
    each setup's height filter) where it differs from float64's, or {}: the first
    difference (``check``'s refusal keys), ``position`` and ``rank`` as for a cap, and
    ``keys``: per height range of ``CITYSCALE_HEIGHT_RANGES``, ``order_keys`` of that range's
    kept detections (None where its order is float64's)."""
    for k in [k for k in np.flatnonzero(category_one(truth)).tolist() if k in replayed]:
        mine = _of_class(rows, k)
        found = []
        for lo, hi in CITYSCALE_HEIGHT_RANGES:
            kept = mine["height"] >= lo / HEIGHT_EXPANSION
            kept &= mine["height"] < hi * HEIGHT_EXPANSION
            found.append(_replay(path, truth, mine, big, k, CITYSCALE_CAP, kept, _CITY_SCRIPT))
        if any(found):
            entry = dict(next(f for f in found if f))
            entry["keys"] = [f["key"] if f else None for f in found]
            del entry["key"]
            return entry
    return {}


def _values(rows, big, at):
    """The Python numbers pycocotools holds for ``rows``' detections ``at``."""
    out = []
    for i in at.tolist():
        record, score, kind = int(rows["record"][i]), float(rows["score"][i]), rows["kind"][i]
        if record in big:
            out.append(big[record])
        else:
            out.append(bool(score) if kind == _BOOL else int(score) if kind == _INT else score)
    return out


def _replay(path, truth, rows, big, k, cap, kept=None, who=_PYCOCOTOOLS):
    """``{}`` when ``who``'s order of class ``k`` is float64's, else the entry of
    ``check``: per image the first ``cap`` by score, of which those ``kept`` (a per-row
    filter applied after the cap, as the CityPersons script's height filter; None:
    all), then the class. Also ``{}`` for a class numpy cannot negate (booleans:
    pycocotools raises; the engine scores them as 1 and 0)."""
    by_image = np.argsort(rows["image"], kind="stable")  # file order within an image
    starts = np.searchsorted(rows["image"][by_image], np.arange(truth.n_images + 1))
    left_out = truth.left_out_boxes(True)  # never found: the lost entries' own boxes
    found = truth.box_class == k if left_out is None else (truth.box_class == k) & ~left_out
    with_truth = np.unique(truth.box_image[found])
    images = np.union1d(np.unique(rows["image"]), with_truth)  # pycocotools' E, in order
    theirs_lists, joined, first = [], [], None
    rank = np.zeros(len(rows["image"]), np.int64)
    for image in images.tolist():
        dets = by_image[starts[image] : starts[image + 1]]
        values = _values(rows, big, dets)
        full = np.argsort([-v for v in values], kind="mergesort")
        rank[dets[full]] = np.arange(len(full))
        theirs = full[:cap]
        ours = np.argsort(-rows["score"][dets], kind="stable")[:cap]
        if kept is not None:
            theirs, ours = theirs[kept[dets[theirs]]], ours[kept[dets[ours]]]
        if first is None and not np.array_equal(theirs, ours):
            first = _refusal(path, truth, rows, big, dets[theirs], dets[ours], image, k, who)
        theirs_lists.append([values[i] for i in theirs.tolist()])
        joined.append(dets[theirs])
    joined = np.concatenate(joined)
    try:
        with np.errstate(all="ignore"):  # pycocotools runs under numpy's defaults
            negated = -np.concatenate(theirs_lists)
            theirs = np.argsort(negated, kind="mergesort")
    except TypeError:  # a boolean class: pycocotools raises, so no order to keep
        return {}
    if first is None:
        ours = np.argsort(-rows["score"][joined], kind="stable")
        if np.array_equal(theirs, ours):
            return {}
        first = _refusal(path, truth, rows, big, joined[theirs], joined[ours], None, k, who)
    key = order_keys(rows, joined[theirs], negated[theirs])
    loaded = rows["position"] >= 0
    return {
        **first,
        "position": rows["position"][loaded].tolist(),
        "rank": rank[loaded].tolist(),
        "key": key[loaded].tolist(),
    }


def order_keys(rows, ranked, values):
    """Integer keys that put a class's detections in pycocotools' order under the
    engine's exact tie order: ascending key, then image, then pycocotools' rank within
    the image (``accumulation_order.orders``).

    ``ranked``: the detections (rows) in pycocotools' class order, ``values`` what it
    sorted them by (``-dtScores`` in the joined type). The key is the dense rank of
    ``values`` along that order: it steps up wherever the value changes. Equal values
    stand in concatenation order there (a stable sort of the images' ranked lists, in
    image order), which is exactly (image, rank); so equal keys are pycocotools' own
    ties (a weighted image's copies repeat such runs, as on duplicated images), and
    any order numpy makes is kept, int64 wrap-around and NaN among objects included.
    Detections left out (beyond the cap) get the key after the last: the cap drops
    them before the order is read."""
    key = np.full(len(rows["image"]), len(ranked), np.int64)
    if not len(ranked):
        return key
    with np.errstate(all="ignore"):
        same = np.asarray(values[1:] == values[:-1], bool)
    key[ranked] = np.cumsum(np.r_[False, ~same])
    return key


def _refusal(path, truth, rows, big, theirs, ours, image, k, who=_PYCOCOTOOLS):
    """The refusal naming the detection at the first rank where the orders differ."""
    n = min(len(theirs), len(ours))  # the cap and a filter may keep unequal counts
    differ = np.flatnonzero(theirs[:n] != ours[:n])
    at = int(differ[0]) if len(differ) else n
    pair = [int(order[at]) for order in (theirs, ours) if at < len(order)]
    exact = [i for i in pair if int(rows["record"][i]) in big]
    det = (exact or pair)[0]
    record = int(rows["record"][det])
    value = _values(rows, big, np.array([det]))[0]
    what = (
        f"is an integer beyond 2**53 that {who} orders"
        if exact
        else f"is ranked by {who} against integers beyond 2**53 that it orders"
    )
    where = (
        f"among the detections of class {truth.classes[k]!r} on image "
        f"{checks.show(truth.image_ids[image])}"
        if image is not None
        else f"in the ranking of class {truth.classes[k]!r} over all images"
    )
    return {
        "path": str(path),
        "record": f"record {record}",
        "field": "score",
        "message": (
            f"score {value!r} {what} "
            f"exactly (numpy keeps Python integers as integers or objects) {where}, where "
            f"this engine's float64 scores tie or round it: {_TAILS[who]} "
            "(write the scores as floats to have them ranked as float64)"
        ),
    }
