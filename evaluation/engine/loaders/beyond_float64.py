"""Integers beyond float64's range in a results file, where pycocotools 2.0.11 meets them.

The engine reads every number as float64: an integer of magnitude >= ``OVERFLOW_LIMIT``
(2**1024 written out in digits, say) reads as infinite. pycocotools reads the file with
Python's ``json``, which keeps it as an exact Python ``int``; converting it to a float
raises OverflowError (``float()`` rounds it to 2**1024). Where that conversion happens
(checked by running pycocotools 2.0.11 on each case, ``tests/engine/test_beyond_float64.py``):

* ``loadRes`` (a file read as boxes) computes ``bb[0]+bb[2]``, ``bb[1]+bb[3]`` and
  ``bb[2]*bb[3]`` for every result: such an integer with a float partner raises there
  (with an integer partner Python computes exactly and nothing raises);
* ``computeIoU`` converts the ``bbox`` of every result it compares (listed image and
  class, among the first ``maxDets[-1]`` of its image and class by its exact rank)
  with ``np.array(..., dtype=double)`` in ``maskUtils.iou``: raises, also on an image
  without ground truth of the class (boxes, masks given with a ``bbox`` and the
  caption reading; the keypoints reading replaces the box);
* ``accumulate``'s fill ``q[ri] = pr[pi]; ss[ri] = dtScoresSorted[pi]`` writes the
  sorted scores (an object array once one list holds such an integer) into a float64
  array: the OverflowError is swallowed by a bare ``except: pass``, so the precision
  of every recall point after the first one landing on such a score stays 0 (one
  matching detection of score 2**1024: AP 1/101). Since engine 2.16.0 the engine
  models that cut: ``overflowing`` gives the detections holding such a score
  (``Predictions.overflowing``), and ``average_precision.interpolated_precision`` stops its
  fill there (``average_precision.fill_stops``).
  Comparisons (``area`` against the size ranges, the score argsorts) are exact in
  Python and raise nothing: an area beyond float64 is scored as infinite.

``refusals`` gives, per per-image cap, the refusal pycocotools' first raise on a box
calls for; ``exact_scores.check`` files it under ``"overflow"`` in the cap's entry,
which ``Predictions.score_conflict`` raises (``coco``: 100, ``recall40``: none), and
the detections holding a score beyond float64's range under ``OVERFLOWING``
(positions into the loaded predictions). Run only on a file holding such a score
(``exact_scores.suspect``) or an infinite loaded box: the file is then read once more
with Python's ``json``, as pycocotools reads it.
"""

import functools
import json
import os

import numpy as np

from .ids import looked_up_ids

#: Magnitude from which ``float()`` of an integer raises OverflowError: it rounds to
#: 2**1024 from halfway between the largest float64 (2**1024 - 2**971) and 2**1024.
OVERFLOW_LIMIT = 2**1024 - 2**970
#: The key of an entry's refusal (``exact_scores.check``).
OVERFLOW = "overflow"
#: The key, among ``Predictions.score_conflicts``, of the detections holding a score
#: beyond float64's range: ``{"position": [...]}`` (``overflowing``).
OVERFLOWING = "beyond_float64"
_PYCOCOTOOLS = "pycocotools 2.0.11"


def overflows(value):
    """An integer float64 cannot hold (``float(value)`` raises OverflowError)."""
    return type(value) is int and abs(value) >= OVERFLOW_LIMIT


def overflowing(rows, big):
    """``{"position": [...]}``: the loaded detections (``rows``' positions, ascending)
    whose score is an integer beyond float64's range, or None where none is. Whatever
    the cap or class: ``average_precision.fill_stops`` reads only those pycocotools accumulates."""
    found = [
        int(p)
        for r, p in zip(rows["record"].tolist(), rows["position"].tolist())
        if p >= 0 and r in big and overflows(big[r])
    ]
    return {"position": sorted(found)} if found else None


def refusals(path, truth, rows, big, caps, boxes, values_of):
    """``{cap: refusal}`` for the caps under which pycocotools 2.0.11 raises on a box
    of the file (``boxes``: some loaded box is infinite); ``rows``/``big``: the
    detections read loosely (``loose_scores._affected``), ``values_of`` gives their
    Python scores."""
    if not boxes:
        return {}
    rank = _ranks(rows, big, values_of)
    records = _records(path)
    if records is None:
        return {}
    out = {}
    for cap in caps:
        compared = np.ones(len(rank), bool) if cap is None else rank < cap
        out[cap] = _box_refusal(path, truth, rows, rank, compared, records)
    return {cap: r for cap, r in out.items() if r}


def _ranks(rows, big, values_of):
    """pycocotools' rank of each detection within its image and class
    (``evaluateImg``: ``np.argsort([-d['score'] ...], kind='mergesort')``, exact)."""
    rank = np.zeros(len(rows["image"]), np.int64)
    group = rows["image"].astype(np.int64) * (int(rows["cls"].max(initial=0)) + 1) + rows["cls"]
    by_group = np.argsort(group, kind="stable")  # file order within a group
    bounds = np.flatnonzero(np.diff(group[by_group])) + 1
    for dets in np.split(by_group, bounds):
        if not len(dets):
            continue
        values = values_of(rows, big, dets)
        order = np.argsort([-v for v in values], kind="mergesort")
        rank[dets[order]] = np.arange(len(dets))
    return rank


def _records(path):
    """The results as Python's ``json`` reads them (pycocotools' ``loadRes``), or None
    where it cannot (the engine refused such a file already or deviates knowingly)."""
    try:
        with open(path, encoding="utf-8") as f:
            records = json.load(f)
    except (ValueError, OSError, RecursionError):
        return None
    return records if type(records) is list and records else None


def _reading(first):
    """``loadRes``' reading, chosen by the first result (its ``if``/``elif`` order)."""
    if type(first) is not dict:
        return None
    if "caption" in first:
        return "caption"
    if "bbox" in first and not first["bbox"] == []:
        return "boxes"
    return "masks" if "segmentation" in first else None


def _box_refusal(path, truth, rows, rank, compared, records):
    reading = _reading(records[0])
    if reading is None:
        return None
    if reading == "boxes":  # loadRes' arithmetic on every result, in file order
        for i, record in enumerate(records):
            bb = record.get("bbox") if type(record) is dict else None
            if type(bb) is list and len(bb) >= 4 and any(overflows(v) for v in bb[:4]):
                try:
                    bb[0] + bb[2], bb[1] + bb[3], bb[2] * bb[3]
                except OverflowError:
                    return _refusal(
                        path,
                        i,
                        "bbox",
                        "loadRes computes with it (x + w, y + h, w * h) and raises OverflowError",
                    )
                except TypeError:
                    pass
    hit = []
    for i in np.flatnonzero(compared).tolist():
        record = int(rows["record"][i])
        bb = records[record].get("bbox") if type(records[record]) is dict else None
        if type(bb) is list and any(overflows(v) for v in bb):
            hit.append((int(rows["image"][i]), int(rows["cls"][i]), int(rank[i]), record))
    if not hit:
        return None
    image, k, _, record = min(hit)  # computeIoU's order: images, then classes
    return _refusal(
        path,
        record,
        "bbox",
        f"computeIoU compares it (class {truth.classes[k]!r}) and raises OverflowError "
        "converting the boxes to float64",
    )


def _refusal(path, record, field, why):
    return {
        "path": str(path),
        "record": f"record {record}",
        "field": field,
        "message": (
            f"{field} holds an integer beyond float64's range, read here as "
            f"infinite; {_PYCOCOTOOLS} keeps it as a Python integer: {why}. The file is "
            f"refused for this protocol (write the number as a float, e.g. 1e400, to "
            "have it read as infinite)"
        ),
    }


def truth_refusal(truth):
    """The refusal of a split pycocotools 2.0.11 cannot compare, or None: a box holding
    an integer beyond float64's range (read here as infinite) on an annotation
    ``computeIoU`` converts — every annotation of a listed image and category, as
    ``loadAnns`` gives it (the last of its id), whatever the detections (``maskUtils.iou``
    converts the ground truth of every (image, class) holding some). Only a split with
    an infinite box whose source is a readable JSON file is re-read (Python's ``json``,
    as pycocotools reads it); an ``area`` beyond float64 is only compared (exact)."""
    if not len(truth.boxes) or not np.isinf(truth.boxes).any():
        return None
    try:
        stat = os.stat(truth.source)
    except (OSError, TypeError, ValueError):
        return None
    return _truth_refusal(str(truth.source), stat.st_mtime_ns, stat.st_size)


def _entries(ids):
    """The values ``evaluate``'s ``list(np.unique(ids))`` looks up (as Python values:
    a float64 entry finds the int of its value, as pycocotools' dicts do)."""
    ids = list(ids)
    try:
        return set(np.unique(ids).tolist()) if ids else set()
    except (TypeError, ValueError):  # kinds numpy cannot sort together: none changed
        return set()


@functools.lru_cache(maxsize=8)
def _truth_refusal(path, _mtime, _size):
    try:
        with open(path, encoding="utf-8") as f:
            split = json.load(f)
        annotations = split["annotations"]
        images = looked_up_ids((image["id"] for image in split["images"]), distinct=True)
        categories = looked_up_ids(category["id"] for category in split["categories"])
        # the values np.unique changed a lost id into find unlisted ids written so
        images |= _entries(dict.fromkeys(image["id"] for image in split["images"]))
        categories |= _entries(category["id"] for category in split["categories"])
        last = {ann["id"]: k for k, ann in enumerate(annotations)}  # createIndex
    except (ValueError, OSError, RecursionError, KeyError, TypeError):
        return None
    for ann in annotations:
        try:
            listed = ann["image_id"] in images and ann["category_id"] in categories
        except (KeyError, TypeError):
            continue
        k = last.get(ann["id"]) if listed else None
        bb = annotations[k].get("bbox") if k is not None else None
        if type(bb) is list and any(overflows(v) for v in bb):
            return _refusal(
                path,
                k,
                "bbox",
                "computeIoU converts every listed annotation's box to float64 and raises "
                "OverflowError",
            ) | {"record": f"annotations[{k}]"}
    return None
