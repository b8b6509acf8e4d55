"""Reading a detector's predictions for a split: the whole file (``load_predictions``,
cached) or a block of records at a time (``stream_predictions``, for the shard pieces).

Both check the same options (``_prediction_options``) and resolve records through
``detection_blocks.resolve``, so a block-at-a-time read gives the whole read's columns
and refusals. Re-exported by ``loaders`` (``from evaluation.engine.loaders import
load_predictions``).
"""

import itertools

import numpy as np

from ..data import Predictions
from ..errors import InputError
from . import (
    CACHE_SCHEMA,
    UNKNOWN_CLASS_POLICIES,
    UNKNOWN_IMAGE_POLICIES,
    _check_ids_option,
    _exists,
    _format,
    as_given,
    boolean_scores,
    checks,
    coco_json,
    csv_tables,
    detection_blocks,
    exact_scores,
    label_folders,
    result_readings,
)
from .cache import cached
from .ids import ids_like


def load_predictions(
    path,
    truth,
    *,
    fmt=None,
    boxes=None,
    unknown_classes="drop",
    unknown_images="reject",
    cache_dir=None,
    ids="any",
):
    """Load a detector's predictions for ``truth``.

    Parameters
    ----------
    boxes : ``"keep"``, ``"clip"``, ``"reject"``, or None for the policy ``truth``
        was loaded under (``"keep"`` by default): see ``checks.apply_box_policy``.
    unknown_classes : ``"drop"`` (default: pycocotools 2.0.11 accepts detections of
        categories the split does not list and never scores them; counted in
        ``dropped``; their ids in ``dropped_classes``) or ``"reject"`` (an error naming
        the record; on the platform, a suite's option)
    unknown_images : ``"reject"`` (default: every detection's image must be in the
        split, as pycocotools' ``loadRes`` asserts) or ``"drop"``: detections of images
        the split does not hold are left out and counted in ``dropped_images`` — for
        scoring a stored file against a later revision of its split, where images were
        removed; never the default for an upload.
    ids : ``"any"`` or ``"int64"``, as for ``load_truth``
    """
    boxes = _prediction_options(path, truth, boxes, unknown_classes, unknown_images, ids)
    fmt = _format(path, fmt)
    key = {
        "kind": "predictions",
        "format": fmt,
        "truth": truth.content_hash(),
        "boxes": boxes,
        "unknown_classes": unknown_classes,
        "ids": ids,
        "schema": CACHE_SCHEMA,
        # 7: a "cityscale_booleans" entry (the CityPersons script's boolean refusal);
        # 6: scores beyond float64's range are listed ("beyond_float64"), no refusal;
        # 5: a "booleans" entry (scores pycocotools joins as a boolean array);
        # 4: entries may carry the "overflow" refusal (scores beyond float64's range);
        # 3: entries carry pycocotools' exact order (2: the cityscale check was added)
        "score_conflicts": 7,
    }
    if unknown_images != "reject":  # the default keeps the keys of existing entries
        key["unknown_images"] = unknown_images
    if truth.boolean_class_ids:  # the hash keeps 1 and true alike; this refuses more
        key["boolean_categories"] = True
    return cached(
        cache_dir,
        [path],
        key,
        lambda: _read_predictions(
            path, truth, fmt, boxes, unknown_classes, ids, unknown_images=unknown_images
        ),
        "predictions",
    )


def _prediction_options(path, truth, boxes, unknown_classes, unknown_images, ids):
    """Check the options of a predictions load; the box policy in force."""
    _exists(path)
    _check_ids_option(path, ids)
    boxes = truth.box_policy if boxes is None else boxes
    checks.check_policy(path, boxes)
    if boxes != "keep":
        missing = np.flatnonzero(np.isnan(truth.image_width) | np.isnan(truth.image_height))
        if len(missing):
            raise InputError(
                truth.source,
                f"image {checks.show(truth.image_ids[missing[0]])} has no width/height; the box "
                f"policy '{boxes}' needs every image's size (use 'keep', or add the sizes)",
                field="width",
            )
    if unknown_classes not in UNKNOWN_CLASS_POLICIES:
        raise InputError(path, f"unknown class policy {unknown_classes!r}; use reject or drop")
    if unknown_images not in UNKNOWN_IMAGE_POLICIES:
        raise InputError(path, f"unknown image policy {unknown_images!r}; use reject or drop")
    return boxes


def stream_predictions(
    path,
    truth,
    *,
    fmt=None,
    boxes=None,
    unknown_classes="drop",
    unknown_images="reject",
    ids="any",
):
    """``load_predictions`` a block of records at a time, for JSON and CSV files:
    yields ``detection_blocks.Resolved`` in file order, whose columns joined and whose
    counts summed are the columns and counts of ``load_predictions`` (same options).
    Memory follows one block (a few MB of the file), not the file. An error is raised
    at the first block holding one, so a file that a whole load refuses is refused
    here too, naming the same record: a refusal of a block's lookup (``resolve``) waits
    until the rest of the file is decoded and looked up (``_first_refusal``).
    A JSON file read "as given" (``as_given``: its ids reach across the file) is read
    whole and yielded as one block.
    """
    boxes = _prediction_options(path, truth, boxes, unknown_classes, unknown_images, ids)
    fmt = _format(path, fmt)
    if fmt not in detection_blocks.STREAMABLE:
        raise InputError(path, f"{fmt} detections cannot be read a block at a time")
    wide = ids == "any"
    exact = exact_scores.cap_values(path, truth, wide) if fmt == "json" else None
    rank_of = detection_blocks.file_ranks(
        path, truth, lambda: detection_blocks.raw_blocks(path, truth, fmt, wide), exact
    )
    blocks = detection_blocks.raw_blocks(path, truth, fmt, wide)
    first = next(blocks)
    if first.reading == result_readings.GIVEN:  # ids across the file: read it whole
        blocks.close()
        raw = _json_whole(path, truth, wide, unknown_images)
        rank_of = detection_blocks.file_ranks(path, truth, lambda: [raw], exact)
        yield detection_blocks.resolve(
            path, truth, raw, boxes, unknown_classes, unknown_images, rank_of
        )
        return
    for raw in itertools.chain([first], blocks):
        try:
            block = detection_blocks.resolve(
                path, truth, raw, boxes, unknown_classes, unknown_images, rank_of
            )
        except InputError as error:
            raise _first_refusal(
                error, blocks, path, truth, boxes, unknown_classes, unknown_images, rank_of
            ) from None
        yield block


def _first_refusal(first, blocks, *args):
    """The refusal a whole load gives, after ``first`` (a block's): a later record
    ``loadRes`` fails on (decoding the rest raises), else the lowest
    stage (``detection_blocks.LOOKUP``...), its first record."""
    for raw in blocks:
        try:
            detection_blocks.resolve(args[0], args[1], raw, *args[2:])
        except InputError as error:
            if error.stage < first.stage:
                first = error
    return first


def _json_whole(path, truth, wide, unknown_images):
    """The ``detection_blocks.Raw`` of a whole JSON results file; read "as given",
    laid out as pycocotools takes its records (``as_given.emit``)."""
    raw = detection_blocks.json_raw(truth, *coco_json.read_detections(path, wide))
    if raw.reading == result_readings.GIVEN:
        raw = as_given.emit(path, raw, unknown_images)
    return raw


def _read_predictions(
    path, truth, fmt, policy, unknown_classes, ids="any", *, unknown_images="reject"
):
    read_dropped = 0
    if fmt == "json":
        raw = _json_whole(path, truth, ids == "any", unknown_images)
    elif fmt in label_folders.FORMATS:

        def to_ids(values, known):
            return ids_like(values, known, truth.image_id_type)

        read = label_folders.read_detections(
            path, fmt, truth, to_ids, drop_unknown_images=unknown_images == "drop"
        )
        ids, labels, boxes, score, locate, read_dropped, corners, positions = read
        fields = {"image": "file name", "class": "type" if fmt == "kitti" else "class"}
        fields["bbox"] = "x1..y2" if fmt == "kitti" else "cx cy w h"
        if fmt == "voc_det":
            fields = {"image": "image_id", "class": "file name", "bbox": "xmin..ymax"}
        shown = np.array(ids, dtype=object).astype(str) if ids else np.zeros(0, str)
        raw = detection_blocks.Raw(
            to_ids(ids, truth.image_ids),
            np.array(labels, dtype=object).astype(str) if labels else np.zeros(0, str),
            boxes,
            score,
            truth.image_ids,
            np.array(truth.classes, dtype=object).astype(str),
            shown,
            locate,
            fields,
            corners=corners,
            records=positions,
        )
    else:
        raw = detection_blocks.csv_raw(truth, *csv_tables.read_detections(path))
    rank_of = None  # the whole file in one block, ranked by float64 score
    if fmt == "json":  # exact where pycocotools ranks integer scores exactly
        exact = exact_scores.cap_values(path, truth, ids == "any")
        rank_of = detection_blocks.file_ranks(path, truth, lambda: [raw], exact)
    block = detection_blocks.resolve(
        path, truth, raw, policy, unknown_classes, unknown_images, rank_of
    )
    conflicts = {}
    if fmt == "json":
        classes = np.unique(block.cls[exact_scores.suspect(block.score)])
        infinite = block.infinite_box  # maybe an integer beyond float64
        conflicts = exact_scores.check(path, truth, classes, ids == "any", infinite)
        tops = boolean_scores.Tops(truth)
        tops.add(block.image, block.cls, block.score, block.alias)
        conflicts = boolean_scores.joined(conflicts, path, truth, tops, ids == "any")
    return Predictions(
        image=block.image,
        cls=block.cls,
        boxes=block.boxes,
        score=block.score,
        dropped=block.dropped,
        dropped_images=read_dropped + block.dropped_images,
        unknown_images=unknown_images,
        source=str(path),
        box_policy=policy,
        box_counts=block.box_counts,
        dropped_classes=block.dropped_classes,
        score_conflicts=conflicts,
        area=block.area,
        free=block.free,
        unwritable=block.unwritable,
        alias=block.alias,
        corners=block.corners,
        record=moved(block.record),
    )


def moved(record):
    """``Predictions.record`` of a file's kept records' positions: None when each is
    its own index (no record was left out or moved)."""
    if np.array_equal(record, np.arange(len(record))):
        return None
    return record
