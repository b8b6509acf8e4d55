"""An annotation's flags as the reference codes read them, apart from its box:
``iscrowd`` as pycocotools 2.0.11 does (``crowd_columns``), and the ``ignore`` and
``id`` values the CityPersons script raises on (``city_faults``, ``unwritable_id``),
for ``coco_truth._Records.annotations``.
"""

import math

import numpy as np

from . import result_readings, unread_fields


def _as_float(value):
    try:
        return float(value)
    except OverflowError:
        return math.inf if value > 0 else -math.inf


def crowd_columns(values):
    """``crowd`` and ``ignore`` from ``iscrowd`` values, as pycocotools 2.0.11 reads
    them: ``_prepare`` ignores a box whose ``iscrowd`` is truthy (0.5 too), while
    ``evaluateImg`` passes ``int(iscrowd)`` to ``maskUtils.iou`` as uint8, so a
    value whose integer part is nonzero (1..255: ``true``, 2, 1.5) is a crowd region
    (crowd IoU, reusable); 0 < |iscrowd| < 1 makes an ignored regular box. Any other
    number is read the same way, as truthiness: nonzero integer part = crowd. An
    integer part outside 0..255 (300, -1, or infinite) passes ``_prepare`` and makes
    pycocotools raise only in ``computeIoU`` (the uint8 cast) when a detection of
    its class meets the box on its image; here it is always a crowd region, and
    ``crowd_wide`` marks it (counted as ``iscrowd_outside_0_255``)."""
    try:
        v = np.array(values, np.float64).reshape(-1)
    except OverflowError:  # an integer beyond float64: infinite, a crowd region
        v = np.array([_as_float(x) for x in values], np.float64)
    whole = np.trunc(v)
    crowd = whole != 0  # NaN and infinities are truthy too
    wide = ~np.isfinite(v) | (whole < 0) | (whole > 255)
    return {"crowd": crowd, "ignore": (v != 0) & ~crowd, "crowd_wide": wide}


def city_faults(anns, base, city_rows):
    """Record in ``city_rows`` (annotation row -> ``{field: (message, truthy)}``, read by
    ``cityscale_raises``) the annotations of a slice starting at row ``base`` whose
    ``ignore`` is NaN or infinite (``int(ignore)`` raises in the CityPersons script's
    ``computeIoU``) or whose id numpy cannot write into ``dtm`` (``unwritable_id``)."""
    for i, a in enumerate(anns):
        if type(a.ignore) is float and not math.isfinite(a.ignore):
            fault = unread_fields.ignore_fault(a.ignore)
            city_rows.setdefault(base + i, {})["ignore"] = (fault, True)
        if type(a.id) in (str, int) and unwritable_id(a.id):  # evaluateImg's dtm write
            city_rows.setdefault(base + i, {})["id"] = (repr(a.id)[:40], True)


def unwritable_id(value):
    """Whether numpy cannot write an annotation id (text, an int) into pycocotools'
    float ``dtm`` (``dtm[tind, dind] = gt[m]['id']``): text Python's ``float`` does not
    read (``"x"``; ``" 2 "``, ``"1_0"``, ``"nan"``, ``"١"`` read), an integer beyond
    float64. Recorded as ``GroundTruth.cityscale_faults["id"]`` for the matching's
    refusal (``sequential_walk.refuse_unwritable_ids``)."""
    try:
        float(value)
    except (ValueError, OverflowError):
        return result_readings.as_float(value) is None
    return False
