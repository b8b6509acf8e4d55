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

import os

from ..errors import InputError
from . import checks, csv_tables, label_folders, truth_columns
from .annotation_index import ANNOTATION_POLICIES
from .cache import cached
from .checks import BOX_POLICIES

__all__ = [
    "ANNOTATION_POLICIES",
    "BOX_POLICIES",
    "FORMATS",
    "detect_format",
    "is_collection",
    "load_predictions",
    "load_truth",
    "stream_predictions",
    "VIS_RATIO_READINGS",
]

#: Bumped when the parsed columns change shape or meaning: old cache entries are unused.
#: 34: truth entries count the iscrowd values pycocotools raises on apart
#: (``iscrowd_pycocotools_raises``);
#: 33: prediction entries keep each detection's record position where records were
#: left out or laid out as given (``Predictions.record``);
#: 32: truth and predictions entries keep a corner format's corners as read where one
#: says more than its xywh (``GroundTruth.corners``, ``Predictions.corners``);
#: 31: truth entries keep the annotations of a repeated id as given beside
#: pycocotools' copies (``GroundTruth.repeated``);
#: 30: a given bbox of nested lists or an RLE object is loaded (NaN box), no longer left
#: out beyond the cap (``truthless_boxes``);
#: 29: truth entries record no city-scale fault for a box under a changed value (scored);
#: 28: keypoint results holding booleans, nested lists or big integers, a null in a
#: given bbox and lists of one mask with a bbox are scored, no longer left out;
#: 27: truth entries keep the boxes under a changed value (``GroundTruth.alias``);
#: 26: truth entries keep class_repeats and boolean_class_ids;
#: 25: a repeated id under an unlisted category numpy's == finds makes a copy;
#: 24: truth entries keep an annotation's height key (``GroundTruth.height_key``);
#: 22: label-file and CSV ids are integers of ASCII digits only (``ids.INTEGER``);
#: 21: truth entries keep the ids np.unique merges (unique_merged_images)
CACHE_SCHEMA = 34
UNKNOWN_CLASS_POLICIES = ("reject", "drop")
#: Detections of images the split does not hold: refused (default; pycocotools'
#: ``loadRes`` asserts every result image is in the set) or, for re-scoring stored
#: files on a relabelled split only, dropped and counted (``Predictions.dropped_images``).
UNKNOWN_IMAGE_POLICIES = ("reject", "drop")


FORMATS = ("json", "csv", *label_folders.FORMATS)


def stream_format(path, fmt=None):
    """The format ``stream_predictions`` reads ``path`` as (``fmt`` or detected)."""
    return _format(path, fmt)


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
    vis_ratio="as-given",
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
        categories are left out, all counted (``annotation_index``); ``strict`` (a
        platform option; its default is ``reference`` too) refuses them naming the
        record.
    vis_ratio : ``"as-given"`` (default), ``"read"`` or ``"unread"``, COCO JSON only
        How an annotation's ``vis_ratio`` key (the city-scale benchmark's) is read.
        ``as-given``: as its ``eval_MR_multisetup.py`` ``_prepare`` reads it, for
        ``miss-rate-cityscale`` (``GroundTruth.vis_ratio``): any number or boolean as
        it is (out of 0-1, NaN, infinite; ``true`` is 1), winning beside a
        ``visibility``; null or text refused naming the record and field (the script
        raises); every other protocol sees the ``read`` visibility. The annotation's
        ``height`` key is read as that ``_prepare`` compares it too
        (``GroundTruth.height_key``, ``miss-rate-cityscale`` only: any number or
        boolean as given, else the box's h; a value it cannot compare refused by that
        protocol where it compares it, never on reading). ``read`` (splits
        frozen with engines 2.9-2.10): the visibility where ``visibility`` is absent,
        a value outside 0-1 or of another type left unread. Both counted in
        ``box_counts`` (``attributes.VISIBILITY_SOURCE_COUNTS``, every format).
        ``unread``: the key is skipped, the reading of splits frozen before it was
        read. Each keeps the content hash of the splits frozen with it.
    """
    _exists(path)
    checks.check_policy(path, boxes)
    _check_ids_option(path, ids)
    if annotations not in ANNOTATION_POLICIES:
        raise InputError(
            path,
            f"unknown annotation policy {annotations!r}; use {', '.join(ANNOTATION_POLICIES)}",
        )
    if vis_ratio not in VIS_RATIO_READINGS:
        raise InputError(
            path,
            f"unknown vis_ratio reading {vis_ratio!r}; use {', '.join(VIS_RATIO_READINGS)}",
        )
    fmt = _format(path, fmt)
    if fmt == "csv" and images is None:
        raise InputError(
            path, "a CSV split needs its images table (image_id, optionally width,height,tags)"
        )
    if images is not None and os.path.isdir(images):  # before the cache hashes it
        raise InputError(images, "is a folder: the images table is a CSV file")
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
    if vis_ratio != "unread":  # entries from before the key was read hold "unread"
        key["vis_ratio"] = vis_ratio
    build = lambda: truth_columns.read_truth(  # noqa: E731
        path, images, fmt, classes, boxes, ids, annotations, vis_ratio
    )
    return cached(cache_dir, sources, key, build, "truth")


#: How an annotation's ``vis_ratio`` key is read (``load_truth(vis_ratio=)``).
VIS_RATIO_READINGS = ("as-given", "read", "unread")

#: ``any``: JSON ids of any size (pycocotools keeps Python ints); ``int64``: refused
#: outside signed 64 bits.
ID_RANGES = ("any", "int64")


def _check_ids_option(path, ids):
    if ids not in ID_RANGES:
        raise InputError(path, f"unknown id range {ids!r}; use {', '.join(ID_RANGES)}")


# Last: ``predictions`` imports the options and helpers above from this package.
from .predictions import load_predictions, stream_predictions  # noqa: E402
