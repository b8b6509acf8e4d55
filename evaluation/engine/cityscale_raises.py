"""Where the CityPersons script ``eval_MR_multisetup.py`` raises on a ground-truth value
(``miss-rate-cityscale``): the annotation it raises on, as an ``InputError`` naming the
file, record and field, raised exactly where the script raises and nowhere else.

``eval_demo.py`` runs ``evaluate(id_setup)`` for the setups 0..3 (reasonable, small,
heavy, all) in turn, and each first ``_prepare``s every annotation of a listed image and
category (``getAnnIds(imgIds, catIds)``: image by image in sorted id order, file order
within), then ``evaluateImg`` per category (sorted ids) and image:

* ``_prepare``: ``ignore = 1 if (h < h_lo or h > h_hi) or (v < v_lo or v > v_hi) else
  ignore``, ``h`` the annotation's ``height`` key (``GroundTruth.cityscale_height``).
  A ``height`` that does not compare with a number (null, text, array, object:
  TypeError) raises at the first test, so in the first setup, wherever ``_prepare``
  reads the annotation. Python's ``or`` stops at the first true test, so a
  ``vis_ratio`` that does not compare raises only where the height test lets the box
  through (a NaN height too) — never for a box outside every setup's height range.
* ``evaluateImg``: when, after ``dt[0:maxDet]`` by score and the expanded height filter
  (``h_lo / 1.25 <= h < h_hi * 1.25``), a detection of the image and category is left,
  ``computeIoU`` takes ``int(o['ignore'])`` of each of its annotations, ordered by
  ``_ignore`` (falsy first, mergesort): NaN and text ``int`` does not read raise
  ValueError, an infinity OverflowError, null, arrays and objects TypeError. A box
  outside the setup has ``ignore = 1`` there, so is never converted.

The loader records the values (``GroundTruth.cityscale_faults``); other protocols never
read them. ``check`` also raises, in the script's order, what ``cityscale_boxes`` finds
(``loadRes``' box arithmetic before any setup; ``iou`` on wide integers after the
``int(ignore)``s of its image and category) and ``accumulate``'s boolean scores
(``loaders.cityscale_booleans``, after the setup's ``evaluate``). Tests:
``tests/engine/test_cityscale_raises.py`` (also ``test_cityscale_boxes.py``,
``test_cityscale_booleans.py``) against ``pedestrian_oracle.cityscale_coco``.
"""

import numpy as np

from . import cityscale_boxes
from .errors import InputError
from .loaders import lost_ids
from .pedestrian_setups import HEIGHT_EXPANSION  # Params.expFilter


def check(truth, predictions, protocol):
    """Raise the ``InputError`` of the first value the script raises on (setups in
    order; in a setup ``_prepare`` before ``evaluateImg``, then ``accumulate``'s
    boolean scores: ``Predictions.cityscale_booleans``), or return None."""
    faults = truth.cityscale_faults or {}
    booleans = predictions.cityscale_booleans()
    load, boxes = cityscale_boxes.first_raises(truth, predictions) or (None, {})
    if load is not None:  # loadRes, before any setup
        _raise_box(*load)
    if not faults and not booleans and not boxes:
        return
    height = truth.cityscale_height()
    visibility = truth.cityscale_visibility()
    seen = _prepared(truth)
    for setup in protocol.setups:
        lo, hi = setup.height
        first = None
        for box, record, message, _ in faults.get("height", ()):  # the first test: always
            if seen[box]:
                key = (int(truth.box_image[box]), box)
                if first is None or key < first[0]:
                    first = (key, record, message, "height")
        for box, record, message, _ in faults.get("vis_ratio", ()):
            if not seen[box]:  # never fetched by _prepare (np.unique lost its id)
                continue
            h = height[box]
            if not (h < lo or h > hi):  # the height test lets it through
                key = (int(truth.box_image[box]), box)
                if first is None or key < first[0]:
                    first = (key, record, message, "vis_ratio")
        if first is None:
            first = _ignore_fault(truth, predictions, protocol, setup, height, visibility)
        box = boxes.get(setup.name)  # iou: after _prepare, and the int(ignore)s of its pair
        if box is not None and (first is None or (first[3] == "ignore" and box[:2] < first[0][:2])):
            _raise_box(*box[2:])
        if first is not None:
            _, record, message, field = first
            raise InputError(truth.source, message, record=record, field=field)
        if booleans and booleans["setup"] == setup.name:  # accumulate's -dtScores
            where = {k: booleans[k] for k in ("record", "field")}
            raise InputError(booleans["path"], booleans["message"], **where)
    if cityscale_boxes.DIFFERS in boxes:  # scored by the script, not as it scores it
        _raise_box(*boxes[cityscale_boxes.DIFFERS][2:])


def _prepared(truth):
    """Per box, whether the script's ``_prepare`` reads its keys. ``getAnnIds(imgIds=
    p.imgIds, catIds=p.catIds)`` after ``evaluate``'s ``np.unique``: images by dict
    lookup (an image whose id numpy changed is never fetched), categories by the list
    test ``ann['category_id'] in catIds``, which compares with ``==``: a numeric id
    numpy rounded equals its rounded value (numpy converts the int to compare it), so
    its annotations are fetched and read, though never evaluated under it
    (``GroundTruth.looked_up``); a text id cut of its trailing U+0000 is not, nor a
    NaN (numpy's NaN is another object than the file's, and NaN == NaN is false). A box
    written with the value numpy changed a lost id into (``GroundTruth.alias``) is
    fetched under that value: ``imgToAnns[C]``, ``C in catIds``."""
    lost = truth.unique_lost_masks()
    if lost is None:
        return np.ones(truth.n_boxes, bool)
    images, classes = lost
    nan = np.asarray(truth.class_ids) == "nan"
    classes = lost_ids.unfetched_classes(classes, nan, truth.class_id_type)
    return ~(images[truth.box_image] | classes[truth.box_class]) | truth.alias_boxes()


def _raise_box(path, record, field, why):
    raise InputError(
        path,
        f"{field} holds an integer read here as float64 (beyond its range: infinite), "
        f"which the CityPersons script (eval_MR_multisetup.py) keeps exact: {why}. The "
        "file is refused for this protocol (write the number as a float, e.g. 1e400, to "
        "have it read as the script reads a float)",
        record=record,
        field=field,
    )


def _ignore_fault(truth, predictions, protocol, setup, height, visibility):
    """The first ``int(ignore)`` of ``evaluateImg`` that raises in ``setup``, or None."""
    entries = (truth.cityscale_faults or {}).get("ignore", ())
    if not entries:
        return None
    boxes = np.array([e[0] for e in entries], np.int64)
    inside = setup.counts(height[boxes], visibility[boxes], script=True)
    keep = setup.keeps(predictions.boxes[:, 3], HEIGHT_EXPANSION)
    cap = protocol.max_detections
    exact = _exact_ranks(predictions) if cap is not None else None
    n_classes = max(len(truth.classes), 1)
    pair = predictions.image.astype(np.int64) * n_classes + predictions.cls
    found = truth.looked_up(predictions.image, predictions.cls, predictions.alias)
    order = np.flatnonzero(found)  # the detections _dts[img, catId] holds
    order = order[np.argsort(pair[order], kind="stable")]  # per (image, class), file order
    pair = pair[order]
    first = None
    left_out = truth.left_out_boxes(True)  # a lost entry's own boxes: not in _gts
    seen = np.ones(len(boxes), bool) if left_out is None else ~left_out[boxes]
    for (box, record, message, truthy), counted, looked in zip(entries, inside, seen):
        if not counted or not looked:  # _prepare set ignore = 1 there, or never ran
            continue
        cls, image = int(truth.box_class[box]), int(truth.box_image[box])
        key = (cls, image, bool(truthy), box)
        if first is not None and key >= first[0]:
            continue
        at = image * n_classes + cls
        d = order[np.searchsorted(pair, at) : np.searchsorted(pair, at, side="right")]
        if cap is not None and len(d) > cap:
            if exact is not None and (exact[d] >= 0).all():  # the script's exact ranks
                d = d[exact[d] < cap]
            else:  # numpy's argsort of -score: NaN last
                d = d[np.argsort(-predictions.score[d], kind="stable")][:cap]
        if keep[d].any():
            first = (key, record, message, "ignore")
    return first


def _exact_ranks(predictions):
    """Per detection, its rank within its image and class in the script's order
    (``evaluateImg``'s ``np.argsort([-d['score'] ...], kind='mergesort')`` on the
    exact values, as pycocotools' own line: ``loaders.exact_scores``' uncapped entry,
    every class holding an integer score it orders otherwise than float64), -1 where
    float64's order is the script's; None where no such class is."""
    entry = (predictions.score_conflicts or {}).get("none")
    if not entry or "position" not in entry:
        return None
    ranks = np.full(len(predictions), -1, np.int64)
    ranks[np.asarray(entry["position"], np.int64)] = entry["rank"]
    return ranks
