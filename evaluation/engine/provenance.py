"""The protocol record: under which exact rules a number was computed.

``annotate`` is the one place that finishes a result: counts, the full protocol record,
the engine version and the ground-truth fingerprint. The CLI (``evaluate``) and the
platform (``evaluation.services.run_evaluation``) both call it, so every CLI JSON and
every stored result carries the same record. ``explain.differences`` compares two
results and says, in words, which settings differ and what each does to the numbers
(``python -m evaluation.engine explain A.json B.json``).
"""

import numpy as np

from .data import ALIAS_CLASS, ALIAS_IMAGE, REPEATED_COPY, REPEATED_GIVEN
from .protocols import BEST_OVERLAP, get_protocol
from .version import ENGINE_VERSION

_MATCHING = {
    "greedy": "greedy: each detection, by score, takes the still-unmatched box of highest "
    "IoU at or above the threshold; regular boxes before ignored ones; crowd regions "
    "absorb any number (pycocotools COCOeval.evaluateImg)",
    BEST_OVERLAP: "best overlap: each detection looks only at the one box of highest "
    "overlap; taken -> duplicate false positive, difficult -> ignored "
    "(PASCAL VOC devkit VOCevaldet.m)",
}
_TIES = {
    "image": "ties in score break by image (ascending id), then file order "
    "(pycocotools accumulate)",
    "file": "ties in score keep file order (the VOC devkit's stable sort of the whole file)",
}
_BOXES = {
    "keep": "boxes scored exactly as given, also outside the frame (as the references)",
    "clip": "predictions clipped to the image frame before matching",
    "reject": "files with boxes leaving the frame refused",
}


def _recall_sampling(protocol):
    points = protocol.recall_points
    if points is None:
        return {"kind": "all points", "count": None, "points": None}
    return {"kind": f"{len(points)} points", "count": len(points), "points": list(points)}


#: Why a class with counted ground truth has no AP (``absent_classes``): not "nothing to
#: measure" but a number the metric leaves undefined, which a release gate cannot pass.
UNDEFINED_AP = (
    "every detection of the class is ignored (matched to a difficult, crowd or "
    "ignored box): precision TP / (TP + FP) is 0/0 throughout, so its AP is "
    "undefined (the VOC 2007 devkit's 11-point loop gives NaN); left out of "
    "the mean, which in the devkit would be NaN"
)


def protocol_record(protocol, truth, predictions, records, result):
    """Every setting that decides the numbers of ``result``, as plain JSON values.

    Matching rule, IoU slots and the per-class values actually applied, recall
    sampling and interpolation, detection cap and its kind, tie order, pixel offset,
    box policy, area source, size buckets, precision epsilon, miss-rate and
    operating-point rules, and which classes were averaged and which were absent, why.
    """
    protocol = get_protocol(protocol)
    table = records.thresholds
    n_boxes = np.bincount(
        truth.box_class[_boxes_read(truth, protocol)], minlength=len(truth.classes)
    )
    n_pos = records.n_positives(0)
    absent = {}
    flags = "crowd, difficult or ignore" if protocol.difficult_ignored else "crowd or ignore"
    lost = set(truth.unique_lost_classes.tolist()) if protocol.tie_order == "image" else set()
    if truth.alias is not None:  # a lost class scored under its changed value
        lost -= set(truth.box_class[(truth.alias & ALIAS_CLASS) != 0].tolist())
    undefined = _undefined_classes(protocol, truth.classes, result)
    for k, name in enumerate(truth.classes):
        if k in lost:
            absent[name] = "its id is one pycocotools' np.unique changes: left out, as there"
        elif n_pos[k] == 0:
            absent[name] = (
                "no ground-truth box"
                if n_boxes[k] == 0
                else f"all {int(n_boxes[k])} ground-truth boxes are ignored ({flags} flags)"
            )
        elif undefined[k]:
            absent[name] = UNDEFINED_AP
    area_given = truth.box_counts.get("area_from_file")
    return {
        "name": protocol.name,
        "version": protocol.version,
        "matching": protocol.matching,
        "iou_thresholds": [float(t) for t in protocol.iou_thresholds],
        "class_iou_thresholds": {c: float(table[0, k]) for k, c in enumerate(truth.classes)},
        "recall_sampling": _recall_sampling(protocol),
        "interpolation": "area under the precision envelope (all points)"
        if protocol.recall_points is None
        else "envelope precision at the first point with recall >= r, 0 if none",
        "precision_epsilon": protocol.precision_epsilon,
        "detection_cap": {
            "max_detections": list(protocol.max_detections),
            "kind": "per image and class, highest scores first"
            if protocol.max_detections_limit is not None
            else "none",
        },
        "tie_order": protocol.tie_order,
        "zero_id": "a match with the box of annotation id 0 is no true positive and the "
        "box stays taken (pycocotools 2.0.11)"
        if protocol.zero_id_unmatched
        else "annotation ids are not read",
        "difficult": "a box flagged difficult is neither TP nor FP (VOC devkit)"
        if protocol.difficult_ignored
        else "the difficult flag is not read: such boxes are scored as any other "
        "(pycocotools 2.0.11)",
        "pixel_offset": protocol.pixel_offset,
        "box_policy": predictions.box_policy,
        "area_source": {
            "truth": "the annotation's area when given, else w*h",
            "truth_areas_from_file": area_given,
            "predictions": _prediction_area(predictions),
        },
        "size_ranges": [list(r) for r in protocol.area_ranges],
        "miss_rate": _miss_rate_rule(protocol),
        "operating_point": "cuts between distinct scores; best F1 on raw precision",
        "averaged_classes": [c for c in truth.classes if c not in absent],
        "absent_classes": absent,
        **({"repeated_classes": repeated} if (repeated := _repeated(truth, protocol)) else {}),
    }


def _miss_rate_rule(protocol):
    """How the per-class log-average miss rate reads the detections (``scorecard``,
    ``operating_point.toolbox_order``): the toolbox's order whatever the tie order."""
    cap = protocol.max_detections_limit
    taken = "every detection" if cap is None else f"every detection of the {cap} per image compared"
    return (
        f"{taken}, in the toolbox's order (score descending, NaN first, then image "
        "ascending, then file position), last point at or below each of 9 FPPI points "
        "10^-2..10^0, miss rate 1 if none, clamp 1e-10 (Dollar et al.)"
    )


#: Why a class counts more than once in every mean over classes (``repeated_classes``).
REPEATED_REASON = (
    "pycocotools 2.0.11 evaluate() runs np.unique on the category ids; among ids beyond "
    "64 bits (an object array) a NaN id listed more than once stays that many entries "
    "(NaN != NaN), and the NaN disturbs the sort so that equal ids (3, 3.0) can stay "
    "apart: it evaluates such a category once per entry, alike, and counts it that "
    "often in every mean over categories; so does this protocol (its per-class row is "
    "listed once)"
)


def _repeated(truth, protocol):
    """``{class name: entries}`` of the classes pycocotools' family counts more than
    once (``GroundTruth.class_repeats``, ``tie_order="image"``), or {}."""
    repeats = truth.class_repeats
    if repeats is None or get_protocol(protocol).tie_order != "image":
        return {}
    return {truth.classes[k]: int(n) for k, n in enumerate(repeats.tolist()) if n != 1}


def _undefined_classes(protocol, classes, result):
    """Per class, whether its AP is undefined (``average_precision.interpolated_precision``: no
    epsilon, a recall point at 0, every detection ignored): read from ``result``,
    where such a class with positives has no AP."""
    points = protocol.recall_points
    if points is None or protocol.precision_epsilon != 0 or min(points) > 0:
        return np.zeros(len(classes), bool)
    rows = result.get("per_class", {})
    return np.array([rows.get(c, {}).get("AP", 0) is None for c in classes], bool)


def _prediction_area(predictions):
    """Where the detections' areas (size ranges) came from: a setting, so the same for
    any two files read alike (how many: ``counts.boxes.predictions.mask_area``,
    ``given_area``, ``keypoint_area`` or ``as_given_area``)."""
    counted = predictions.box_counts
    if counted.get("mask_area") is not None:
        return (
            "mask area (RLE) of each result's segmentation, as pycocotools "
            "2.0.11 loadRes reads a file whose first result has a segmentation and no bbox; "
            "a missing bbox is the mask's (rleToBbox)"
        )
    if counted.get("given_area") is not None:
        return (
            "each result's own area and bbox as given, as pycocotools 2.0.11 loadRes "
            "reads a file whose first result has a caption key"
        )
    if counted.get("keypoint_area") is not None:
        return (
            "keypoints' extent: bbox [x0, y0, x1-x0, y1-y0] and area (x1-x0)*(y1-y0) "
            "over every keypoint, replacing any given bbox, as pycocotools 2.0.11 loadRes "
            "reads a file whose first result has keypoints and no bbox or segmentation"
        )
    if counted.get("as_given_area") is not None:
        return (
            "each result's own area, bbox and id as given, as pycocotools 2.0.11 loadRes "
            "keeps a file whose first result has no caption, non-empty bbox, segmentation "
            "or keypoints: a repeated id takes the last result of that id in the place of "
            "each; under coco an id not above 0 leaves the box it matches free"
        )
    return "w*h (negative when one side is: outside every bounded range)"


def counts(truth, predictions, records):
    """What was scored: images, boxes, predictions read, scored, clipped, dropped, and
    what the box policy found (boxes out of frame, wholly outside, zero-area)."""
    return {
        "images": truth.n_images,
        "truth_boxes": truth.n_boxes,
        "predictions": len(predictions),
        "scored_predictions": records.n_detections,
        "clipped_predictions": predictions.clipped,
        "dropped_predictions": predictions.dropped,
        **({"dropped_classes": list(predictions.dropped_classes)} if predictions.dropped else {}),
        **(
            {"dropped_unknown_images": predictions.dropped_images}
            if predictions.unknown_images == "drop"
            else {}
        ),
        "boxes": {
            "policy": predictions.box_policy,
            "truth": dict(truth.box_counts),
            "predictions": dict(predictions.box_counts),
        },
    }


#: How many ids ``lost_ids`` names.
SHOWN_LOST_IDS = 20
LOST_REASON = (
    "{} evaluate() runs np.unique on the {} ids, which changes these ids "
    "(numpy rounds them to float64, cuts a trailing U+0000, or makes a new NaN, which "
    "equals nothing), then finds no ground truth "
    "and no detections under them: their boxes and detections are left out"
)


def lost_ids(truth, protocol):
    """``counts["images_left_out"]`` and ``counts["classes_left_out"]`` under
    pycocotools' rules (``tie_order="image"``) where its ``np.unique`` loses image or
    category ids (``GroundTruth.unique_lost_images``/``unique_lost_classes``): how many,
    their ground-truth boxes, the first ids and why; nothing where none is lost."""
    if get_protocol(protocol).tie_order != "image":
        return {}
    return left_out_counts(truth)


def left_out_counts(truth, reference="pycocotools 2.0.11"):
    """``lost_ids``' counts under any reference whose ``evaluate`` runs ``np.unique`` on
    the ids (pycocotools; the CityPersons script, ``miss-rate-cityscale``)."""
    out = {}
    for what, lost, ids, column in (
        ("images", truth.unique_lost_images, truth.image_ids, truth.box_image),
        ("classes", truth.unique_lost_classes, truth.class_ids, truth.box_class),
    ):
        if len(lost):
            own = np.isin(column, lost) & ~truth.alias_boxes()  # not under a changed value
            out[f"{what}_left_out"] = {
                what: len(lost),
                "truth_boxes": int(own.sum()),
                "ids": [str(v) for v in ids[lost[:SHOWN_LOST_IDS]].tolist()],  # exact in JS too
                "reason": LOST_REASON.format(
                    reference, "image" if what == "images" else "category"
                ),
            }
    return out


CHANGED_VALUE_REASON = {
    True: "pycocotools 2.0.11's np.unique changes a listed {} id into the value these "
    "records are written with (their image or category is not listed), and evaluate() "
    "finds them under that id: scored there, as there",
    False: "these records name an image or category the file does not list (written with "
    "the value pycocotools' np.unique changes a listed id into); this protocol's "
    "reference keeps every id and leaves them out, as every record of an unlisted id",
}


def changed_value_counts(truth, predictions, protocol):
    """``counts["under_changed_value"]``: the boxes (``GroundTruth.alias``) and
    detections (``Predictions.alias``) of an unlisted image or category written with
    the value pycocotools' ``np.unique`` changed a lost id into, and whether
    ``protocol`` scored them (pycocotools' family, ``tie_order="image"``) or left them
    out (every other reading); nothing where there is none."""
    boxes = truth.alias_boxes()
    dets = predictions.box_counts.get("under_changed_value", 0)  # streamed ones too
    if not (boxes.any() or dets):
        return {}
    scored = get_protocol(protocol).tie_order == "image"
    families = []
    if truth.alias is not None and (truth.alias & ALIAS_IMAGE).any():
        families.append("image")
    if dets or (truth.alias is not None and (truth.alias & ALIAS_CLASS).any()):
        families.append("category")
    return {
        "under_changed_value": {
            "truth_boxes": int(boxes.sum()),
            "detections": int(dets),
            "scored": scored,
            "reason": CHANGED_VALUE_REASON[scored].format(" or ".join(families)),
        }
    }


REPEATED_ID_REASON = {
    "copies": "pycocotools 2.0.11's loadAnns (the CityPersons script uses it too) reads an "
    "annotation id given more than once as its last annotation (anns[id]): each "
    "annotation of that id is scored as a copy of the last one, under its image and "
    "category",
    "as given": "this protocol's reference (the VOC devkit, KITTI's devkit, the pedestrian "
    "toolbox) never reads annotation ids: each annotation of a repeated id is scored as "
    "the file gives it",
}


def repeated_id_counts(truth, copies):
    """``counts["repeated_ids"]`` where an annotation id is given more than once
    (``GroundTruth.repeated``): how many annotations pycocotools reads as copies of
    another and how many the file gives in their place, and which the protocol read
    (``copies``: pycocotools' family, ``tie_order="image"``, and the CityPersons
    script; else each as given), with ``truth_boxes``, the boxes it read. Nothing where
    no id repeats."""
    if truth.repeated is None:
        return {}
    read = "copies" if copies else "as given"
    return {
        "truth_boxes": int((~truth.repeated_left_out(copies)).sum()),
        "repeated_ids": {
            "copies": int((truth.repeated == REPEATED_COPY).sum()),
            "as_given": int((truth.repeated == REPEATED_GIVEN).sum()),
            "read": read,
            "reason": REPEATED_ID_REASON[read],
        },
    }


def _reads_copies(protocol):
    """Whether ``protocol`` reads pycocotools' copies of a repeated annotation id."""
    return get_protocol(protocol).tie_order == "image"


def _boxes_read(truth, protocol):
    """Per box, whether ``protocol`` reads it at all (``GroundTruth.repeated_left_out``)."""
    return ~truth.repeated_left_out(_reads_copies(protocol))


def annotate(result, truth, predictions, records, protocol):
    """Finish a result: counts, the protocol record, engine version, truth fingerprint,
    and the protocol's digest (``Protocol.digest``: custom protocols named alike differ)."""
    result["counts"] = counts(truth, predictions, records)
    result["counts"].update(lost_ids(truth, protocol))
    if repeated := _repeated(truth, protocol):
        result["counts"]["classes_repeated"] = {
            "classes": repeated,
            "reason": REPEATED_REASON,
        }
    result["counts"].update(changed_value_counts(truth, predictions, protocol))
    result["counts"].update(repeated_id_counts(truth, _reads_copies(protocol)))
    result["protocol_record"] = protocol_record(protocol, truth, predictions, records, result)
    result["engine_version"] = ENGINE_VERSION
    result["truth_fingerprint"] = truth.content_hash()
    result["protocol_sha256"] = get_protocol(protocol).digest()
    return result
