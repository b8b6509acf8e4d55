"""A CSV split as truth columns: the images table (``image_id``, sizes, tags) and the
boxes table (corners, flags, attributes; its don't-care rows become regions), with
the classes named by ``classes`` or by the labels found, numbered from 1. The columns
are those ``truth_columns.read_truth`` validates, as for COCO JSON and label folders."""

import numpy as np

from ..errors import InputError
from . import csv_tables
from .ids import csv_ids, ids_like


def csv_truth_columns(path, images, classes):
    """The columns of the CSV split ``path`` (boxes) and ``images`` (the images table)."""
    ids, widths, heights, tags, image_lines = csv_tables.read_images(images)
    boxes = csv_tables.read_boxes(path)
    image_ids = csv_ids(ids)
    region = boxes["dont_care"]
    regions = {"region_image_ids": ids_like(_take(boxes["image_id"], region), image_ids)}
    regions["regions"], regions["region_lines"] = boxes["boxes"][region], boxes["lines"][region]
    regions["region_corners"] = boxes["corners"][region]
    if region.any():  # a don't-care row is no box
        keep = ~region
        for key in (
            "boxes",
            "corners",
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
        "box_corners": boxes["corners"],
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
