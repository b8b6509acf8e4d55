"""Given bboxes pycocotools 2.0.11 reads only where an image and class hold no truth.

In the readings that keep each result's own ``bbox`` (caption, as given, masks with a
``bbox``), ``COCOeval.computeIoU`` passes the first 100 detections' boxes of an (image,
category) to ``maskUtils.iou(d, g, iscrowd)``, whose ``_preproc`` converts ``d`` whole:
``np.array(d, dtype=np.double)`` when every entry is a list of length 4, ``_frString(d)``
(RLE objects) when every entry is a dict, else it raises. Only then does ``iou`` return
``[]`` when ``g`` (the ground truth, ``_gts[imgId, catId]``) is empty, before reading a
value. So a box of uniform nested lists (``[[2], [3], [10], [8]]``, numpy shape
``(4, 1)``) or an RLE object ``_frString`` reads is compared without error exactly
where the image and class hold no truth under pycocotools' family and every compared
detection there has a box of that *kind* (the same nested shape, or an RLE object):
numpy raises on a ragged array (a plain box beside a nested one, two nested shapes),
``iou`` on a list mixing dicts and boxes, and with truth ``bbIou``/``rleIou`` cannot
take them. ``evaluateImg`` then reads only each detection's ``area``: they are false
positives with that area.

``kind`` names a box's kind (None: no such box, unfit as any bad box); the record is
carried unfit with that kind (``uncompared.kinds``), loaded with a NaN box, and
refused by ``detection_blocks.resolve`` only where compared in a group holding truth
(``truth_groups``) or beside a detection of another kind (``uncompared.mixed``).
Checked by running pycocotools 2.0.11 (``tests/engine/test_truthless_boxes.py``).
"""

import numpy as np

from ..data import ALIAS_CLASS
from ..errors import InputError

#: The kind of a box given as an RLE object (nested boxes: ``("shape", shape)``).
RLE = ("rle",)


def kind(value):
    """The kind of a given ``bbox`` that is not 4 numbers but that ``_preproc`` reads
    when every compared box of its group is of its kind: ``("shape", s)`` for a list of
    4 entries numpy makes a double array of shape ``s`` (more than one axis) of,
    ``RLE`` for an object ``_frString`` reads; else None."""
    if type(value) is dict:
        return RLE if _rle_reads(value) else None
    if type(value) is not list or len(value) != 4:
        return None  # _preproc's isbox needs len(obj) == 4 and a list
    try:
        shape = np.array([value], dtype=np.double).shape[1:]
    except (ValueError, TypeError, OverflowError):
        return None  # ragged, or a value numpy cannot make a double of
    return ("shape", shape) if len(shape) > 1 else None


def _rle_reads(value):
    """Whether ``_frString`` reads ``value`` as it reads a segmentation (``counts``
    text, ``size`` two numbers 0..2^64-1, text that ends; no ``toBbox`` here)."""
    from . import mask_results

    try:
        seg = mask_results._segmentation("", value, 0)
        probe = mask_results.MaskDetection(0, 0, 0.0, seg, (0.0,) * 4)
        mask_results.columns([probe], "", 0)
    except InputError:
        return False
    return True


def message(kind, value):
    """The refusal of a box of ``kind`` (``value`` as given) where it is compared."""
    what = "an RLE object" if kind == RLE else f"nested lists (numpy shape {kind[1]})"
    return (
        f"must be 4 numbers [x, y, w, h], got {what} {value!r:.40}: "
        "pycocotools 2.0.11's computeIoU reads such a box only where its image and class "
        "hold no ground truth and every compared detection there has a box of its kind"
    )


def truthless(kind):
    """Whether a ``uncompared.kinds`` kind is (or holds) a box of this module's."""
    if kind is None or type(kind) is not tuple:
        return False
    return kind == RLE or kind[0] == "shape" or truthless(kind[-1])


def truth_groups(truth):
    """The (image, class) groups, numbered as ``detection_blocks._groups`` numbers a
    detection's, that hold ground truth under pycocotools' family (``_gts[imgId,
    catId]`` not empty): a box's own, and for a box written with a lost category's
    changed value (``GroundTruth.alias``, ``ALIAS_CLASS``) the group of the detections
    under that value. Groups of images and categories ``np.unique`` loses hold none
    there, but no detection of theirs is compared either."""
    n_classes = len(truth.classes)
    group = truth.box_image.astype(np.int64) * n_classes + truth.box_class
    if truth.alias is not None:
        moved = (truth.alias & ALIAS_CLASS) != 0
        group = np.where(moved, group + truth.n_images * n_classes, group)
    return np.unique(group)


def truthful(truth):
    """Per group (as ``detection_blocks._groups`` numbers them), whether it holds truth
    under pycocotools' family (``truth_groups``, built on first call)."""
    held = []

    def holds(group):
        if not held:
            held.append(truth_groups(truth))
        return np.isin(group, held[0])

    return holds
