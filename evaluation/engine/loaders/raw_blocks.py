"""A JSON or CSV detections file's blocks as read, before lookup (``Raw``).

``raw_blocks`` reads a file a block of records at a time (``coco_json.detection_blocks``,
``csv_tables.detection_blocks``) and gives each as a ``Raw``: the records' image ids and
class keys made comparable with the split's (``json_raw``, ``csv_raw``), their boxes and
scores, and how the file names each record. ``detection_blocks.resolve`` turns each into
engine columns; these names are imported from ``detection_blocks`` too.
"""

import dataclasses

import numpy as np

from . import coco_json, csv_tables
from .ids import ids_like, keys_of, typed_keys


@dataclasses.dataclass
class Raw:
    """One block's columns as read, before lookup. ``locate(i)`` names record ``i``
    of the block as the file counts it; ``shown``: the image ids as written."""

    image_ids: np.ndarray
    class_keys: np.ndarray
    boxes: np.ndarray
    score: np.ndarray
    known_images: np.ndarray
    known_classes: np.ndarray
    shown: np.ndarray
    locate: object
    fields: dict
    area: np.ndarray = None  # per detection, for size ranges: None = w * h (the box's)
    reading: str = None  # how a JSON file was read (``mask_results.mode``): None = boxes
    #: per detection None, or the ``(field, message)`` pycocotools fails on only if it
    #: compares the detection (``uncompared``), or ``(field, message, kind)`` (loaded;
    #: ``uncompared.mixed``); None: every record fit
    unfit: np.ndarray = None
    base: int = 0  # the file's number of the block's first record
    ids: np.ndarray = None  # the records' own ids, read "as given" (``as_given``)
    free: np.ndarray = None  # per row: its id leaves a matched box free (``as_given``)
    unwritable: np.ndarray = None  # per row: its record if numpy cannot write its id
    extra_counts: dict = None  # counts ``as_given.emit`` adds to ``box_counts``
    corners: np.ndarray = None  # (n, 4) as read, of a corner format (CSV, VOC, KITTI)
    #: per row, the file record it carries (``detection_blocks.record_positions``); None:
    #: ``base + row``
    records: np.ndarray = None


def json_raw(
    truth,
    image_ids,
    class_keys,
    boxes,
    score,
    area=None,
    reading=None,
    unfit=None,
    ids=None,
    base=0,
):
    """A block of a COCO-style results file (records ``base``, ``base + 1``...);
    ``area``: the detections' areas of a file not read as boxes, ``reading`` which
    reading (``mask_results.mode``, ``result_readings``), ``unfit`` as ``Raw.unfit``."""
    shown = image_ids
    image_ids, known_images = _json_keys(image_ids, truth.image_ids, truth.image_id_type)
    class_keys, known_classes = _json_keys(class_keys, truth.class_ids, truth.class_id_type)
    return Raw(
        image_ids,
        class_keys,
        boxes,
        score,
        known_images,
        known_classes,
        shown,
        lambda i: f"record {base + i}",
        {"image": "image_id", "class": "category_id", "bbox": "bbox"},
        area,
        reading,
        unfit,
        base,
        ids,
    )


def _json_keys(values, known, id_type):
    """A JSON detections id column and the split's ids, made comparable: as they are
    when both are int64; typed keys (``ids``) when the split's are JSON ids of another
    kind or the file's are not all int64, so an id matches only its own type, as in
    pycocotools; against CSV text ids, as text (CSV has no types)."""
    if known.dtype.kind == "i" and values.dtype.kind == "i":
        return values, known
    if known.dtype.kind != "i" and not id_type:
        return values.astype(str), known.astype(str)
    return typed_keys(values), keys_of(known, id_type)


def csv_raw(truth, ids, labels, boxes, score, lines, corners=None, base=0):
    """A block of a detections CSV (``lines``: each record's line number; ``corners``
    as read; ``base``: the file's data row number of the block's first record)."""
    return Raw(
        ids_like(ids, truth.image_ids, truth.image_id_type),
        np.array(labels, dtype=object).astype(str) if labels else np.zeros(0, str),
        boxes,
        score,
        truth.image_ids,
        np.array(truth.classes, dtype=object).astype(str),
        np.array(ids, dtype=object).astype(str) if ids else np.zeros(0, str),
        lambda i: f"line {lines[i]}",
        {"image": "image_id", "class": "label", "bbox": "x_min..y_max"},
        corners=corners,
        base=base,
    )


def raw_blocks(path, truth, fmt, wide):
    """``Raw`` blocks of a JSON or CSV detections file, in file order, at least one
    (an empty file of records gives one empty block)."""
    given = False
    if fmt == "json":
        base = 0
        for columns in coco_json.detection_blocks(path, wide):
            given = True
            yield json_raw(truth, *columns, base=base)
            base += len(columns[3])
        if not given:
            yield json_raw(truth, *coco_json.empty_columns())
    elif fmt == "csv":
        base = 0
        for ids, labels, boxes, score, lines, corners in csv_tables.detection_blocks(path):
            given = True
            yield csv_raw(truth, ids, labels, boxes, score, lines, corners, base)
            base += len(score)
        if not given:
            yield csv_raw(truth, [], [], np.zeros((0, 4)), np.zeros(0), np.zeros(0, np.int64))
    else:
        raise ValueError(f"{fmt} detections cannot be read a block at a time")
