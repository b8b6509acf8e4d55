"""An annotation's flags as the reference codes read them, apart from its box:
``iscrowd`` as pycocotools 2.0.11 does (``crowd_columns``), the ``ignore`` and
``id`` values the CityPersons script raises on (``city_faults``, ``unwritable_id``)
and its ``height`` key as that script compares it (``height_columns``), for
``coco_truth._Records.annotations``.
"""

import math

import msgspec
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


_NUMBER_TYPES = frozenset({int, float, bool})


def height_columns(anns, base, city_rows):
    """``height_key`` (float64, NaN where not given) and ``height_given`` (bool) of the
    annotations' ``height`` key, read as the CityPersons script's ``_prepare`` compares
    it with the setups' height ranges (``gt['height'] < HtRng[0] or gt['height'] >
    HtRng[1]``; read with ``vis_ratio="as-given"`` only): any JSON number as given
    (``NaN`` too, which no range test puts outside; an integer beyond float64 as
    +-inf, which compares with the finite bounds as the integer does) or boolean (0/1,
    as Python compares it). Absent: not given (the engine takes ``bbox[3]`` there, where
    the script raises KeyError). Null, text, arrays and objects, on which Python
    raises TypeError there, are not given and recorded in ``city_rows`` (row ->
    ``{"height": (message, truthy)}``) for ``cityscale_raises``, which refuses them
    under ``miss-rate-cityscale`` only, where ``_prepare`` reads them."""
    values = [getattr(a, "height", msgspec.UNSET) for a in anns]
    if set(map(type, values)) <= _NUMBER_TYPES:  # the common case: every key a number
        try:
            return {
                "height_key": np.array(values, np.float64).reshape(-1),
                "height_given": np.ones(len(values), bool),
            }
        except OverflowError:  # an integer beyond float64: one by one below
            pass
    numbers, given = [], []
    for i, value in enumerate(values):
        number = None if value is msgspec.UNSET else unread_fields.as_number(value)
        if number is None and value is not msgspec.UNSET:
            shown = "null" if value is None else f"{value!r:.40}"
            message = (
                "must be a number or boolean (the city-scale script compares an "
                f"annotation's height with the setups' height ranges), got {shown}"
            )
            city_rows.setdefault(base + i, {})["height"] = (message, bool(value))
        numbers.append(math.nan if number is None else number)
        given.append(number is not None)
    return {
        "height_key": np.array(numbers, np.float64).reshape(-1),
        "height_given": np.array(given, bool).reshape(-1),
    }
