"""Loading ground truth and predictions from files into validated columns.

``load_truth`` and ``load_predictions`` are the only way files enter the engine:
every check happens here, once, and every error names the file, the record and the
field. With ``cache_dir`` the parsed columns are kept as ``.npz`` keyed by the file's
SHA-256 (and for predictions the split's hash and the policies), so re-scoring the
same bytes skips parsing.

Box policy (``boxes``): ``keep`` (default) scores every box as given, as pycocotools
and the VOC devkit do; ``clip`` cuts predictions to the frame; ``reject`` refuses
boxes that leave it. See ``checks.apply_box_policy``.

Formats: COCO-style JSON, CSV tables, and folders or zips of KITTI, YOLO or Pascal
VOC label files (``label_folders``), named or detected from the content.
"""

import numpy as np

from ..data import GroundTruth, Predictions
from ..errors import InputError
from . import (
    annotation_index,
    attributes,
    checks,
    coco_json,
    csv_tables,
    detection_blocks,
    label_folders,
)
from .annotation_index import ANNOTATION_POLICIES
from .cache import cached
from .checks import BOX_POLICIES
from .ids import csv_ids, ids_like

__all__ = [
    "ANNOTATION_POLICIES",
    "BOX_POLICIES",
    "FORMATS",
    "detect_format",
    "is_collection",
    "load_predictions",
    "load_truth",
    "stream_predictions",
]

#: Bumped when the parsed columns change shape or meaning: old cache entries are unused.
CACHE_SCHEMA = 5
UNKNOWN_CLASS_POLICIES = ("reject", "drop")
#: Detections of images the split does not hold: refused (default; pycocotools'
#: ``loadRes`` asserts every result image is in the set) or, for re-scoring stored
#: files on a relabelled split only, dropped and counted (``Predictions.dropped_images``).
UNKNOWN_IMAGE_POLICIES = ("reject", "drop")


FORMATS = ("json", "csv", *label_folders.FORMATS)


def _format(path, fmt):
    if fmt:
        if fmt not in FORMATS:
            raise InputError(path, f"unknown format {fmt!r}; use one of {', '.join(FORMATS)}")
        if fmt in label_folders.FORMATS and not label_folders.is_collection(path):
            raise InputError(path, f"a {fmt} split or detection set is a folder or a zip")
        return fmt
    if label_folders.is_collection(path):
        return label_folders.detect_path(path)
    name = str(path).lower()
    if name.endswith(".json"):
        return "json"
    if name.endswith(".csv"):
        return "csv"
    return "json" if csv_tables.sniff_is_json(path) else "csv"


def detect_format(path):
    """The format ``load_truth``/``load_predictions`` would read ``path`` as."""
    _exists(path)
    return _format(path, None)


is_collection = label_folders.is_collection


def _exists(path):
    if label_folders.is_collection(path):
        return
    try:
        with open(path, "rb"):
            pass
    except OSError as e:
        raise InputError(path, f"cannot open: {e.strerror}") from None


def load_truth(
    path,
    *,
    images=None,
    fmt=None,
    classes=None,
    cache_dir=None,
    boxes="keep",
    ids="any",
    annotations="reference",
):
    """Load a benchmark split.

    Parameters
    ----------
    path : COCO-style JSON, a boxes CSV (then ``images`` is the images table), or a
        folder or zip of KITTI, YOLO or VOC label files (``images`` optional)
    classes : sequence of str, optional
        For CSV: the class list in order; default the sorted labels found.
    boxes : ``"keep"`` (default), ``"clip"`` or ``"reject"``
        ``clip`` and ``reject`` need every image's size; ``reject`` refuses ground
        truth overhanging the frame by more than ``checks.TRUTH_BOUNDS_TOLERANCE``.
        Under ``keep`` and ``clip`` ground truth is kept as given (and counted).
    ids : ``"any"`` (default: any JSON integer, as pycocotools) or ``"int64"`` (a
        JSON id outside signed 64 bits is an input error naming it; the platform's)
    annotations : ``"reference"`` (default) or ``"strict"``, COCO JSON only
        ``reference`` scores the annotations pycocotools scores: an id given twice
        resolves to the last annotation with it, annotations of unlisted images or
        categories are left out, all counted (``annotation_index``); ``strict`` (the
        platform's) refuses them naming the record.
    """
    _exists(path)
    checks.check_policy(path, boxes)
    _check_ids_option(path, ids)
    if annotations not in ANNOTATION_POLICIES:
        raise InputError(
            path,
            f"unknown annotation policy {annotations!r}; use {', '.join(ANNOTATION_POLICIES)}",
        )
    fmt = _format(path, fmt)
    if fmt == "csv" and images is None:
        raise InputError(
            path, "a CSV split needs its images table (image_id, optionally width,height,tags)"
        )
    sources = [path] + ([images] if images is not None else [])
    key = {
        "kind": "truth",
        "format": fmt,
        "classes": list(classes) if classes else None,
        "boxes": boxes,
        "ids": ids,
        "schema": CACHE_SCHEMA,
    }
    if annotations != "reference":  # the default keeps the keys of existing entries
        key["annotations"] = annotations
    build = lambda: _read_truth(path, images, fmt, classes, boxes, ids, annotations)  # noqa: E731
    return cached(cache_dir, sources, key, build, "truth")


#: ``any``: JSON ids of any size (pycocotools keeps Python ints); ``int64``: refused
#: outside signed 64 bits.
ID_RANGES = ("any", "int64")


def _check_ids_option(path, ids):
    if ids not in ID_RANGES:
        raise InputError(path, f"unknown id range {ids!r}; use {', '.join(ID_RANGES)}")


def _widen(cols, names):
    """An id family (the images' ids and the boxes' references to them...) with one
    id beyond signed 64 bits becomes object arrays of Python ints throughout, so it
    sorts and matches numerically as pycocotools' Python ints do."""
    if any(cols[name].dtype == object for name in names):
        for name in names:
            cols[name] = np.array([int(v) for v in cols[name].tolist()], dtype=object)


def _as_text(ids):
    """Ids kept as decimal text once sorted: beyond int64 they fit no numpy integer."""
    return ids.astype(str) if ids.dtype == object else ids


def _read_truth(path, images, fmt, classes, policy, ids="any", annotations="reference"):
    if fmt == "json":
        cols = coco_json.read_truth(path, wide=ids == "any")
        _widen(cols, ("image_ids", "box_image_ids", "region_image_ids"))
        _widen(cols, ("class_ids", "box_class_ids"))
        image_locate = lambda i: f"images[{i}]"  # noqa: E731
        box_locate = lambda i: f"annotations[{i}]"  # noqa: E731
        box_fields = {"image": "image_id", "class": "category_id", "bbox": "bbox", "id": "id"}
        image_path = path
        checks.check_unique(path, cols["class_ids"], lambda i: f"categories[{i}]", "id")
        checks.check_unique(
            path,
            np.array(cols["class_names"], dtype=object).astype(str),
            lambda i: f"categories[{i}]",
            "name",
        )
        region_locate = lambda i: f"dont_care[{i}]"  # noqa: E731
    elif fmt == "csv":
        cols = _csv_truth_columns(path, images, classes)
        image_path = images
        image_locate = lambda i: f"line {cols['image_lines'][i]}"  # noqa: E731
        box_locate = lambda i: f"line {cols['box_lines'][i]}"  # noqa: E731
        box_fields = {"image": "image_id", "class": "label", "bbox": "x_min..y_max", "id": "id"}
        region_locate = lambda i: f"line {cols['region_lines'][i]}"  # noqa: E731
    else:
        cols = label_folders.read_truth(path, images, fmt, classes)
        cols["image_ids"] = csv_ids(cols["image_ids"])
        cols["box_image_ids"] = ids_like(cols["box_image_ids"], cols["image_ids"])
        cols["region_image_ids"] = ids_like(cols["region_image_ids"], cols["image_ids"])
        image_path = cols["image_path"]
        image_locate, box_locate = cols["locate_image"], cols["locate_box"]
        region_locate, box_fields = cols["locate_region"], cols["box_fields"]

    if len(cols["image_ids"]) == 0:
        raise InputError(image_path, "the split lists no images", field="images")
    checks.check_unique(
        image_path, cols["image_ids"], image_locate, "id" if fmt == "json" else "image_id"
    )
    for name in ("image_width", "image_height"):
        values = cols[name]
        field = name.split("_")[1]
        given = ~np.isnan(values)  # absent from the file: NaN (optional in COCO JSON)
        if policy == "keep":  # never read (pycocotools neither): an infinite, zero or
            # negative size is no size (counted as on_images_without_size)
            with checks.ieee():
                values = cols[name] = np.where(np.isinf(values) | (values <= 0), np.nan, values)
            given = ~np.isnan(values)
        checks.fail_at(image_path, given & np.isinf(values), image_locate, field, "must be finite")
        checks.fail_at(
            image_path,
            given & (values <= 0),
            image_locate,
            field,
            lambda i, values=values: f"must be > 0, got {values[i]:g}",
        )
        checks.require_sizes(image_path, values, image_locate, policy, field)
    annotation_counts = dict.fromkeys(annotation_index.COUNTS, 0)
    if fmt == "json" and annotations == "strict":
        checks.check_unique(path, cols["box_ids"], box_locate, "id")
    elif fmt == "json":
        rows, annotation_counts = annotation_index.resolve(
            cols, cols["image_ids"], cols["class_ids"]
        )
        if rows is not None:
            annotation_index.take(cols, rows)
            box_locate = lambda i: f"annotations[{rows[i]}]"  # noqa: E731

    image_order = np.argsort(cols["image_ids"], kind="stable")  # numeric, also when wide
    image_ids = cols["image_ids"][image_order]
    class_order = np.argsort(cols["class_ids"], kind="stable")
    class_ids = cols["class_ids"][class_order]

    box_image, found = checks.resolve(path, cols["box_image_ids"], image_ids, box_locate, "", "")
    checks.require_found(
        path, found, cols["box_image_ids"], box_locate, box_fields["image"], "image"
    )
    box_class, found = checks.resolve(path, cols["box_class_ids"], class_ids, box_locate, "", "")
    checks.require_found(
        path, found, cols["box_class_ids"], box_locate, box_fields["class"], "class"
    )

    boxes = cols["boxes"]
    checks.check_boxes(path, boxes, box_locate, box_fields["bbox"], policy)
    frame = (cols["image_width"][image_order], cols["image_height"][image_order])
    if policy == "reject":
        for at in range(0, len(boxes), checks.BLOCK_ROWS):  # per block: no full-length
            rows = slice(at, at + checks.BLOCK_ROWS)  # per-box width/height copies
            checks.check_inside(
                path,
                boxes[rows],
                frame[0][box_image[rows]],
                frame[1][box_image[rows]],
                lambda i, at=at: box_locate(at + i),
                box_fields["bbox"],
            )
    area = cols["box_area"]
    given = cols.get("box_area_given")
    given = ~np.isnan(area) if given is None else given
    if policy == "reject":  # pycocotools takes a NaN area (in every size range), inf
        checks.fail_at(  # (outside every one) and a negative area (outside too)
            path,
            given & ~np.isfinite(area),
            box_locate,
            "area",
            lambda i: f"must be a finite number, got {area[i]} (box policy: reject)",
        )
        checks.fail_at(
            path,
            given & (area < 0),
            box_locate,
            "area",
            lambda i: f"must be >= 0, got {area[i]:g} (box policy: reject)",
        )
    negative_area = int((given & (area < 0)).sum())
    with checks.ieee():
        area = np.where(given, area, boxes[:, 2] * boxes[:, 3])

    road = attributes.finish(path, cols, image_ids, box_locate, path, region_locate)
    names = [cols["class_names"][i] for i in class_order]
    tags = [cols["image_tags"][i] for i in image_order]
    return GroundTruth(
        classes=tuple(names),
        class_ids=_as_text(class_ids),
        image_ids=_as_text(image_ids),
        image_width=cols["image_width"][image_order],
        image_height=cols["image_height"][image_order],
        image_tags=tuple(tuple(t) for t in tags),
        box_ids=_as_text(cols["box_ids"]),
        box_image=box_image,
        box_class=box_class,
        boxes=boxes,
        box_area=area,
        crowd=cols["crowd"],
        difficult=cols["difficult"],
        ignore=cols["ignore"],
        source=str(path),
        box_policy=policy,
        box_counts={
            **checks.truth_box_counts(boxes, *frame, box_image),
            "area_from_file": int(given.sum()),
            "negative_area_from_file": negative_area,
            "non_finite_area_from_file": int((given & ~np.isfinite(area)).sum()),
            **annotation_counts,
        },
        **road,
    )


def _csv_truth_columns(path, images, classes):
    ids, widths, heights, tags, image_lines = csv_tables.read_images(images)
    boxes = csv_tables.read_boxes(path)
    image_ids = csv_ids(ids)
    region = boxes["dont_care"]
    regions = {"region_image_ids": ids_like(_take(boxes["image_id"], region), image_ids)}
    regions["regions"], regions["region_lines"] = boxes["boxes"][region], boxes["lines"][region]
    if region.any():  # a don't-care row is no box
        keep = ~region
        for key in (
            "boxes",
            "crowd",
            "difficult",
            "ignore",
            "area",
            "area_given",
            "lines",
            "dont_care",
        ):
            boxes[key] = boxes[key][keep]
        for key in ("occlusion", "truncation", "visibility"):
            boxes[key] = boxes[key][keep]
        boxes["image_id"] = _take(boxes["image_id"], keep)
        boxes["label"] = _take(boxes["label"], keep)
    box_image_ids = ids_like(boxes["image_id"], image_ids)
    labels = boxes["label"]
    if classes is None:
        names = sorted(set(labels))
    else:
        names = list(classes)
        if len(set(names)) != len(names):
            raise InputError("classes", "class names must be unique")
    index = {name: i + 1 for i, name in enumerate(names)}
    label_ids = np.array([index.get(label, -1) for label in labels], np.int64)
    for i in np.flatnonzero(label_ids < 0)[:1]:
        raise InputError(
            path,
            f"label {labels[i]!r} is not one of the split's classes",
            record=f"line {boxes['lines'][i]}",
            field="label",
        )
    return {
        "image_ids": image_ids,
        "image_width": widths,
        "image_height": heights,
        "image_tags": tags,
        "image_lines": image_lines,
        "class_ids": np.arange(1, len(names) + 1, dtype=np.int64),
        "class_names": names,
        "box_ids": np.asarray(boxes["lines"], np.int64),
        "box_image_ids": box_image_ids,
        "box_class_ids": label_ids,
        "boxes": boxes["boxes"],
        "box_area": boxes["area"],
        "box_area_given": boxes["area_given"],
        "crowd": boxes["crowd"],
        "difficult": boxes["difficult"],
        "ignore": boxes["ignore"],
        "box_lines": boxes["lines"],
        "occlusion": boxes["occlusion"],
        "truncation": boxes["truncation"],
        "visibility": boxes["visibility"],
        **regions,
    }


def _take(values, mask):
    return [v for v, keep in zip(values, mask) if keep]


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
        ``dropped``) or ``"reject"`` (the platform's: an error naming the record)
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
    }
    if unknown_images != "reject":  # the default keeps the keys of existing entries
        key["unknown_images"] = unknown_images
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
    here too (possibly naming an earlier record than the whole load's first check).
    """
    boxes = _prediction_options(path, truth, boxes, unknown_classes, unknown_images, ids)
    fmt = _format(path, fmt)
    if fmt not in detection_blocks.STREAMABLE:
        raise InputError(path, f"{fmt} detections cannot be read a block at a time")
    for raw in detection_blocks.raw_blocks(path, truth, fmt, ids == "any"):
        yield detection_blocks.resolve(path, truth, raw, boxes, unknown_classes, unknown_images)


def _read_predictions(
    path, truth, fmt, policy, unknown_classes, ids="any", *, unknown_images="reject"
):
    read_dropped = 0
    if fmt == "json":
        raw = detection_blocks.json_raw(truth, *coco_json.read_detections(path, ids == "any"))
    elif fmt in label_folders.FORMATS:
        ids, labels, boxes, score, locate, read_dropped = label_folders.read_detections(
            path, fmt, truth, ids_like, drop_unknown_images=unknown_images == "drop"
        )
        fields = {"image": "file name", "class": "type" if fmt == "kitti" else "class"}
        fields["bbox"] = "x1..y2" if fmt == "kitti" else "cx cy w h"
        if fmt == "voc_det":
            fields = {"image": "image_id", "class": "file name", "bbox": "xmin..ymax"}
        shown = np.array(ids, dtype=object).astype(str) if ids else np.zeros(0, str)
        raw = detection_blocks.Raw(
            ids_like(ids, truth.image_ids),
            np.array(labels, dtype=object).astype(str) if labels else np.zeros(0, str),
            boxes,
            score,
            truth.image_ids,
            np.array(truth.classes, dtype=object).astype(str),
            shown,
            locate,
            fields,
        )
    else:
        raw = detection_blocks.csv_raw(truth, *csv_tables.read_detections(path))
    block = detection_blocks.resolve(path, truth, raw, policy, unknown_classes, unknown_images)
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
    )
