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
calls on the exact values; where that order (per image, capped, or per class) differs
from the engine's, the file is refused under the COCO order (``matching.match``) naming
the record. Where the orders agree the numbers are pycocotools' already.
"""

import numpy as np

from . import checks, coco_json, detection_blocks, json_literals, unread_fields

#: Magnitude from which an integer may have no float64 of its own (2**53 + 1 has none).
EXACT_LIMIT = 2.0**53

#: The per-image caps checked: pycocotools' ``maxDets[-1]`` (coco) and none (recall40).
CAPS = (100, None)


def suspect(score):
    """Scores that may be integers float64 rounds or ties (|score| >= 2**53, inf too)."""
    score = np.asarray(score, np.float64)
    with np.errstate(invalid="ignore"):
        return np.abs(score) >= EXACT_LIMIT


def _loose(collected):
    def decode(piece, path="", base=0):
        loose = json_literals.decode(piece, list[unread_fields.LooseDetection])
        collected.append([r.score for r in loose])
        return unread_fields.normalise_detections(path, loose, base)

    return decode


def _affected_rows(path, truth, classes, wide):
    """``(image, cls, record, value, float)`` of the scored detections of ``classes``
    (second, loose read of the file; value: the Python number pycocotools holds)."""
    collected, rows, base = [], [], 0
    wanted = np.zeros(len(truth.classes), bool)
    wanted[list(classes)] = True
    for columns in coco_json.detection_blocks(path, wide, decode=_loose(collected)):
        values = collected.pop()
        raw = detection_blocks.json_raw(truth, *columns, base=base)
        image, found_i = checks.resolve(path, raw.image_ids, raw.known_images, raw.locate, "", "")
        cls, found_c = checks.resolve(path, raw.class_keys, raw.known_classes, raw.locate, "", "")
        keep = np.flatnonzero(found_i & found_c)
        keep = keep[wanted[cls[keep]]]
        for i in keep.tolist():
            rows.append((int(image[i]), int(cls[i]), base + i, values[i], float(columns[3][i])))
        base += len(columns[3])
        collected.clear()
    return rows


def check(path, truth, classes, wide):
    """``{cap_key: refusal or {}}`` for ``CAPS`` — empty when ``classes`` (the classes
    holding a ``suspect`` score) is empty — of the JSON detections file at ``path``."""
    if not len(classes):
        return {}
    by_class = {}
    for row in _affected_rows(path, truth, classes, wide):
        by_class.setdefault(row[1], []).append(row)
    conflicts = {}
    for cap in CAPS:
        found = {}
        for k in sorted(by_class):
            found = _replay(path, truth, by_class[k], k, cap)
            if found:
                break
        conflicts["none" if cap is None else str(cap)] = found
    return conflicts


def _replay(path, truth, rows, k, cap):
    """The first place pycocotools' order of class ``k`` differs from float64's."""
    by_image = {}
    for row in rows:  # file order within an image
        by_image.setdefault(row[0], []).append(row)
    with_truth = np.unique(truth.box_image[truth.box_class == k]).tolist()
    images = sorted(set(by_image) | set(with_truth))  # pycocotools' E: ascending ids
    theirs_lists, theirs_rows, ours_rows, ours_scores = [], [], [], []
    for image in images:
        dets = by_image.get(image, [])
        theirs = np.argsort([-d[3] for d in dets], kind="mergesort")[:cap].tolist()
        ours = np.argsort(-np.array([d[4] for d in dets], np.float64), kind="stable")
        ours = ours[:cap].tolist()
        if theirs != ours:
            return _refusal(path, truth, dets, theirs, ours, image, k)
        theirs_lists.append([dets[i][3] for i in theirs])
        theirs_rows += [dets[i] for i in theirs]
        ours_rows += [dets[i] for i in ours]
        ours_scores += [dets[i][4] for i in ours]
    try:
        with np.errstate(all="ignore"):  # pycocotools runs under numpy's defaults
            scores = np.concatenate(theirs_lists)
            theirs = np.argsort(-scores, kind="mergesort").tolist()
    except TypeError:  # a boolean class: pycocotools raises, so no order to keep
        return {}
    ours = np.argsort(-np.array(ours_scores, np.float64), kind="stable").tolist()
    if theirs != ours:
        return _refusal(path, truth, theirs_rows, theirs, ours, None, k)
    return {}


def _refusal(path, truth, dets, theirs, ours, image, k):
    at = next(i for i, (a, b) in enumerate(zip(theirs, ours)) if a != b)
    pair = [dets[theirs[at]], dets[ours[at]]]
    exact = [d for d in pair if type(d[3]) is int and abs(d[3]) >= EXACT_LIMIT]
    det = (exact or pair)[0]
    what = (
        "is an integer beyond 2**53 that pycocotools 2.0.11 orders"
        if exact
        else "is ranked by pycocotools 2.0.11 against integers beyond 2**53 that it orders"
    )
    where = (
        f"among the detections of class {truth.classes[k]!r} on image "
        f"{checks.show(truth.image_ids[image])}"
        if image is not None
        else f"in the ranking of class {truth.classes[k]!r} over all images"
    )
    return {
        "path": str(path),
        "record": f"record {det[2]}",
        "field": "score",
        "message": (
            f"score {det[3]!r} {what} "
            f"exactly (numpy keeps Python integers as integers or objects) {where}, where "
            "this engine's float64 scores tie or round it: the COCO-order numbers would "
            "differ from pycocotools', so the file is refused for this protocol (write "
            "the scores as floats to have them ranked as float64)"
        ),
    }
