"""Integers beyond float64's range in boxes, where the CityPersons script meets them
(``miss-rate-cityscale``).

The engine reads every number as float64: an integer of magnitude >= 2**1024 - 2**970
reads as infinite (``loaders.beyond_float64.overflows``). The script reads the files
with Python's ``json``, which keeps it an exact ``int``, and computes with it in Python:

* its ``coco.py`` ``loadRes`` (from memory: pycocotools' lines, ``height`` added)
  computes ``bb[0]+bb[2]``, ``bb[1]+bb[3]`` and ``bb[2]*bb[3]`` for every result, in
  file order, before any setup: with a float partner Python converts the integer and
  raises OverflowError (with an integer partner it computes exactly);
* ``computeIoU`` (per setup, category and image, only where a detection is left after
  the cap of 1,000 and the height filter, after ``int(ignore)`` of every annotation)
  calls ``iou(d, g, iscrowd)``, which (from memory) starts with ``dts =
  np.asarray(dts); gts = np.asarray(gts)``: a box list holding such an integer is an
  object array of the Python values, any other a float64 (or int64) array. Its loop
  then adds, multiplies, compares (``min``/``max``: a numpy float against such an
  integer converts it) and ends with ``float(t) / unionarea``: wherever such an integer
  meets a float it raises OverflowError; a zero union of Python floats would raise
  ZeroDivisionError (caught too; boxes that reach it have positive areas).

``first_raises`` replays exactly that on the files as Python's ``json`` reads them
(``iou_raise`` is the script's loop, statement by statement), only when a loaded box is
infinite; ``cityscale_raises.check`` raises what it finds in the script's order.
"""

import functools
import json
import os

import numpy as np

from .loaders.beyond_float64 import overflows
from .loaders.ids import looked_up_ids
from .pedestrian_setups import CITYSCALE_SETUPS, HEIGHT_EXPANSION

_CAP = 1000  # Params.maxDets
_RAISES = (OverflowError, ZeroDivisionError)
#: From this magnitude an integer in a box may compute otherwise in the script than in
#: float64: products of two reach 2**52 (float64 rounds; int64 wraps beyond 2**63),
#: beyond int64 numpy's integer scalars raise OverflowError against it, beyond
#: float64's range Python's floats do.
WIDE = 2**26
#: What ``_pair_raise`` reports where the script scores a pair whose overlap the
#: engine's infinite reading would change.
DIFFERS = "differs"


def script_iou(dts, gts, pyiscrowd):
    """The script's ``COCOeval.iou`` on these Python boxes (lists of 4 numbers):
    ``(raised, ious)`` — where it raises, ``("gt", j, error)``, ``("dt", i, error)`` or
    ``("pair", i, j, error)`` (``error`` the exception's name), and None for ``ious``;
    else None and its matrix."""
    try:
        dts, gts, pyiscrowd = np.asarray(dts), np.asarray(gts), np.asarray(pyiscrowd)
    except (ValueError, TypeError):  # ragged or odd boxes: not this rule
        return None, None
    ious = np.zeros((len(dts), len(gts)))
    with np.errstate(all="ignore"):
        for j, gt in enumerate(gts):
            try:
                gx1, gy1, gx2, gy2 = gt[0], gt[1], gt[0] + gt[2], gt[1] + gt[3]
                garea = gt[2] * gt[3]
            except _RAISES as e:
                return ("gt", j, type(e).__name__), None
            for i, dt in enumerate(dts):
                try:
                    dx1, dy1, dx2, dy2 = dt[0], dt[1], dt[0] + dt[2], dt[1] + dt[3]
                    darea = dt[2] * dt[3]
                except _RAISES as e:
                    return ("dt", i, type(e).__name__), None
                try:
                    unionw = min(dx2, gx2) - max(dx1, gx1)
                    if unionw <= 0:
                        continue
                    unionh = min(dy2, gy2) - max(dy1, gy1)
                    if unionh <= 0:
                        continue
                    t = unionw * unionh
                    unionarea = darea if pyiscrowd[j] else darea + garea - t
                    ious[i, j] = float(t) / unionarea
                except _RAISES as e:
                    return ("pair", i, j, type(e).__name__), None
    return None, ious


def _as_read(bbox):
    """A box as the engine reads it (float64; beyond its range: infinite)."""
    return [(np.inf if v > 0 else -np.inf) if overflows(v) else float(v) for v in bbox]


def first_raises(truth, predictions):
    """``(load, {setup name: (category position, image position, path, record, field,
    why)})`` — ``loadRes``' raise as ``(path, record, field, why)`` (None: none) and,
    per setup, the first (category, image) in the script's order (sorted ids: the
    engine's class and image order) whose ``iou`` raises — or None where no box is
    infinite (loaded, or dropped with ``loadRes`` raising on it: ``exact_scores``'
    ``"overflow"`` entries) or the files are not the script's JSON."""
    held = any(  # a record the load dropped whose box pycocotools' loadRes raises on
        type(e) is dict and "overflow" in e for e in (predictions.score_conflicts or {}).values()
    )
    if not (held or _has_wide(truth.boxes) or _has_wide(predictions.boxes)):
        return None
    try:
        stats = [os.stat(p) for p in (truth.source, predictions.source)]
    except (OSError, TypeError, ValueError):
        return None
    key = [
        (str(p), s.st_mtime_ns, s.st_size)
        for p, s in zip((truth.source, predictions.source), stats)
    ]
    return _first_raises(*key[0], *key[1])


@functools.lru_cache(maxsize=8)
def _first_raises(gt_path, _m1, _s1, dt_path, _m2, _s2):
    try:
        with open(gt_path, encoding="utf-8") as f:
            dataset = json.load(f)
        with open(dt_path, encoding="utf-8") as f:
            results = json.load(f)
        img_ids = sorted({im["id"] for im in dataset["images"]})
        cat_ids = sorted({c["id"] for c in dataset["categories"]})
        # evaluate's np.unique: ids it loses are never looked up (ids.unique_lost)
        looked = looked_up_ids((im["id"] for im in dataset["images"]), distinct=True)
    except (ValueError, OSError, RecursionError, KeyError, TypeError):
        return None
    if type(results) is not list or not results or not _boxes_reading(results[0]):
        return None
    load = _load_raise(dt_path, results)
    if load is not None:
        return load, {}
    listed = [i for i in img_ids if i in looked]
    gts = _grouped(dataset.get("annotations", []), listed, cat_ids, by_id=True)
    dts = _grouped(results, listed, cat_ids)
    cat_at = {c: k for k, c in enumerate(cat_ids)}
    img_at = {i: k for k, i in enumerate(img_ids)}
    pairs = [p for p in set(gts) | set(dts) if _holds_wide(gts.get(p, ()), dts.get(p, ()))]
    pairs.sort(key=lambda p: (cat_at[p[1]], img_at[p[0]]))
    found = {}
    for setup in CITYSCALE_SETUPS:
        for img, cat in pairs:
            hit = _pair_raise(setup, gts.get((img, cat), []), dts.get((img, cat), []))
            if hit is None:
                continue
            key = DIFFERS if hit[-1] == DIFFERS else setup.name
            if key not in found:
                found[key] = (cat_at[cat], img_at[img]) + _message(gt_path, dt_path, hit)
            if key != DIFFERS:
                break
    return None, found


def _boxes_reading(first):
    """``loadRes``' box reading (its ``elif`` after ``caption``)."""
    return type(first) is dict and "caption" not in first and first.get("bbox", []) != []


def _load_raise(dt_path, results):
    for i, record in enumerate(results):
        bb = record.get("bbox") if type(record) is dict else None
        if type(bb) is list and len(bb) >= 4 and any(overflows(v) for v in bb[:4]):
            try:
                bb[0] + bb[2], bb[1] + bb[3], bb[2] * bb[3]
            except OverflowError:
                return (
                    dt_path,
                    f"record {i}",
                    "bbox",
                    "loadRes computes with it (x + w, y + h, w * h) and raises OverflowError",
                )
            except TypeError:
                pass
    return None


def _grouped(anns, img_ids, cat_ids, by_id=False):
    """``_prepare``'s groups by (image, category) of ``getAnnIds(imgIds, catIds)`` then
    ``loadAnns``: (record, ann) image by image in sorted id order, file order within,
    of listed categories; ``by_id`` (the ground truth): each resolved to the last
    annotation of its id (``createIndex``). Ids compare as Python compares them."""
    cats, by_image, last = set(cat_ids), {}, {}
    for k, ann in enumerate(anns):
        try:
            by_image.setdefault(ann["image_id"], []).append((k, ann))
            if by_id:
                last[ann["id"]] = k
        except (KeyError, TypeError):
            continue
    out = {}
    for img in img_ids:
        for k, ann in by_image.get(img, ()):
            try:
                if ann["category_id"] not in cats:
                    continue
                if by_id:
                    k = last[ann["id"]]
                    ann = anns[k]
                out.setdefault((ann["image_id"], ann["category_id"]), []).append((k, ann))
            except (KeyError, TypeError):
                continue
    return out


def _has_wide(boxes):
    with np.errstate(invalid="ignore"):
        return bool((np.abs(boxes) >= WIDE).any())


def _wide(value):
    return type(value) is int and abs(value) >= WIDE


def _holds_wide(*groups):
    for group in groups:
        for _, ann in group:
            bb = ann.get("bbox")
            if type(bb) is list and any(_wide(v) for v in bb):
                return True
    return False


def _pair_raise(setup, gts, dts):
    """``evaluateImg`` of one image and category in ``setup``: its ``iou`` raise as
    ``(which, record, ann)``, or None."""
    (h_lo, h_hi), (v_lo, v_hi) = setup.height, setup.visibility
    try:
        order = np.argsort([-d["score"] for _, d in dts], kind="mergesort")[:_CAP]
    except (TypeError, KeyError):
        return None
    kept = [dts[i] for i in order.tolist()]
    kept = [d for d in kept if h_lo / HEIGHT_EXPANSION <= d[1]["bbox"][3] < h_hi * HEIGHT_EXPANSION]
    if not kept:
        return None  # computeIoU never runs
    ignore = []
    for _, g in gts:  # _prepare's ignore (the engine's height: the key, else the box's h)
        try:
            h = g["height"] if "height" in g else g["bbox"][3]
            v = g.get("vis_ratio", g.get("visibility", 1.0))
            out = h < h_lo or h > h_hi or v < v_lo or v > v_hi
            ignore.append(1 if out else g.get("ignore", 0))
        except (TypeError, KeyError, IndexError):
            return None  # _prepare raises first (cityscale_raises)
    order = np.argsort([1 if v else 0 for v in ignore], kind="mergesort").tolist()
    gts = [gts[i] for i in order]  # evaluateImg: ignore last, stable
    try:
        crowd = [int(ignore[i]) for i in order]
    except (TypeError, ValueError, OverflowError):
        return None  # int(ignore) raises first (cityscale_raises)
    dts, gts_boxes = [d["bbox"] for _, d in kept], [g["bbox"] for _, g in gts]
    hit, ious = script_iou(dts, gts_boxes, crowd)
    if hit is None and ious is not None:  # scored: do the engine's infinities agree?
        _, read = script_iou([_as_read(b) for b in dts], [_as_read(b) for b in gts_boxes], crowd)
        differ = np.argwhere(~((ious == read) | (np.isnan(ious) & np.isnan(read))))
        if len(differ):
            i, j = differ[np.lexsort((differ[:, 0], differ[:, 1]))[0]]
            hit = ("pair", int(i), int(j), DIFFERS)
    if hit is None:
        return None
    error = hit[-1]
    if hit[0] == "gt":
        return ("gt", gts[hit[1]][0], error)
    dt = kept[hit[1]]
    if hit[0] == "pair" and not any(_wide(v) for v in dt[1]["bbox"]):
        return ("gt", gts[hit[2]][0], error)
    return ("dt", dt[0], error)


def _message(gt_path, dt_path, hit):
    which, record, error = hit
    path = dt_path if which == "dt" else gt_path
    shown = f"record {record}" if which == "dt" else f"annotations[{record}]"
    if error == DIFFERS:
        why = (
            "the script scores the file, computing with the integer as np.asarray keeps "
            "it (int64, or Python integers beyond int64), and its overlap with this box "
            "differs from the one this engine computes in float64, so this protocol's "
            "numbers would differ from the script's (a known limit: refused)"
        )
    elif error == "ZeroDivisionError":
        why = (
            "np.asarray keeps the box list as Python numbers (an integer beyond int64 "
            "in it), and float(t) / unionarea divides by a zero union in Python: "
            "ZeroDivisionError"
        )
    else:
        why = (
            "np.asarray keeps the integer (int64, or Python integers beyond int64), and "
            "where an integer beyond float64's range meets a float, or one beyond int64 "
            "meets numpy's int64 (added, compared, multiplied), Python raises "
            "OverflowError"
        )
    return path, shown, "bbox", f"computeIoU's iou computes with it in Python: {why}"
