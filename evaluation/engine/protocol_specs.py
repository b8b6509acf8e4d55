"""Custom protocols from a JSON object (``protocol_from_dict``): every key checked,
each error naming the key, on top of a preset (``protocols.PRESETS``)."""

import math
import re

from .errors import InputError
from .protocols import (
    BEST_OVERLAP,
    GREEDY,
    PRESET_NAMES,
    PRESETS,
    TIE_ORDERS,
    Protocol,
)

#: The highest ``version`` a custom protocol may give (the platform stores it in a
#: 32-bit positive integer column, ``Scorecard.protocol_version``).
MAX_VERSION = 2**31 - 1


def _number_list(spec, key, source, *, low, high):
    values = spec[key]
    if not isinstance(values, (list, tuple)) or not values:
        raise InputError(source, "must be a non-empty list of numbers", field=key)
    for i, value in enumerate(values):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise InputError(source, f"item {i} is not a number: {_short(value)}", field=key)
        if not (_is_number(value) and low <= value <= high):
            raise InputError(
                source, f"item {i} = {_short(value)} is outside [{low}, {high}]", field=key
            )
    return tuple(float(v) for v in values)


def protocol_from_dict(spec, source="protocol"):
    """Build a custom protocol; every field is checked and errors name it.

    Keys: ``name`` (required, no preset's name: ``PRESET_NAMES``), ``version``,
    ``base`` (a preset to start from), ``matching``, ``iou_thresholds``,
    ``class_iou_thresholds`` (class → IoU), ``recall_points`` (list, or ``"all"`` for
    the all-point area), ``pixel_offset``, ``max_detections``, ``tie_order``
    (``TIE_ORDERS``), ``area_ranges`` (the size buckets: ``[[name, low, high], ...]``
    in pixels², the first ``["all", 0, high]`` as pycocotools' ``Params.areaRng``,
    each box counted in ``low <= area <= high``), ``zero_id_unmatched`` and
    ``difficult_ignored`` (bools; inherited from ``base``).
    """
    if not isinstance(spec, dict):
        raise InputError(source, "a custom protocol must be a JSON object")
    known = {
        "name",
        "version",
        "base",
        "description",
        "matching",
        "iou_thresholds",
        "class_iou_thresholds",
        "recall_points",
        "pixel_offset",
        "max_detections",
        "tie_order",
        "area_ranges",
        "zero_id_unmatched",
        "difficult_ignored",
    }
    for key in spec:
        if key not in known:
            raise InputError(source, f"unknown key; allowed: {', '.join(sorted(known))}", field=key)
    if not isinstance(spec.get("name"), str) or not spec["name"]:
        raise InputError(source, "a custom protocol needs a non-empty name", field="name")
    if spec["name"].casefold() in {name.casefold() for name in PRESET_NAMES}:
        # a result records the protocol by name: under a preset's name it would read as
        # the preset's (``explain`` would call two different rule sets the same); in
        # another case (``COCO``) a suite could list both, and a reader take one for the
        # other
        raise InputError(
            source,
            f"{spec['name']!r} is a preset's name (names compare case-insensitively); give "
            "a custom protocol its own name",
            field="name",
        )
    base = spec.get("base", "coco")
    if not isinstance(base, str) or base not in PRESETS:
        raise InputError(
            source,
            f"must be a preset ({', '.join(sorted(PRESETS))}), got {base!r}",
            field="base",
        )
    base = PRESETS[base]
    values = dict(base.__dict__)
    values.update(name=spec["name"], description=spec.get("description", f"custom ({base.name})"))
    values["coco_summary"] = False
    if "version" in spec:
        version = spec["version"]
        if (
            isinstance(version, bool)
            or not isinstance(version, int)
            or not 1 <= version <= MAX_VERSION
        ):
            raise InputError(
                source, f"must be a whole number from 1 to {MAX_VERSION}", field="version"
            )
        values["version"] = spec["version"]
    if "matching" in spec:
        if spec["matching"] not in (GREEDY, BEST_OVERLAP):
            raise InputError(source, f"must be '{GREEDY}' or '{BEST_OVERLAP}'", field="matching")
        values["matching"] = spec["matching"]
    if "iou_thresholds" in spec:
        values["iou_thresholds"] = _number_list(spec, "iou_thresholds", source, low=0.0, high=1.0)
    if "class_iou_thresholds" in spec:
        table = spec["class_iou_thresholds"]
        if not isinstance(table, dict):
            raise InputError(source, "must map class names to IoU", field="class_iou_thresholds")
        for name, value in table.items():
            if (
                isinstance(value, bool)
                or not isinstance(value, (int, float))
                or not 0 <= value <= 1
            ):
                raise InputError(
                    source,
                    f"IoU for {name!r} must be in [0, 1], got {_short(value)}",
                    field="class_iou_thresholds",
                )
        folded = [str(k).casefold() for k in table]
        if len(set(folded)) != len(folded):
            raise InputError(
                source,
                "names a class twice (names match case-insensitively)",
                field="class_iou_thresholds",
            )
        values["class_iou_thresholds"] = {str(k): float(v) for k, v in table.items()}
        values["check_class_names"] = True
    if "recall_points" in spec:
        if spec["recall_points"] == "all":
            values["recall_points"] = None
        else:
            points = _number_list(spec, "recall_points", source, low=0.0, high=1.0)
            if list(points) != sorted(points):
                raise InputError(source, "must be ascending", field="recall_points")
            values["recall_points"] = points
    if "pixel_offset" in spec:
        offset = spec["pixel_offset"]
        if isinstance(offset, bool) or not isinstance(offset, (int, float)) or offset not in (0, 1):
            raise InputError(source, "must be 0 or 1", field="pixel_offset")
        values["pixel_offset"] = float(spec["pixel_offset"])
    if "max_detections" in spec:
        cap = spec["max_detections"]
        if cap is not None and (not isinstance(cap, int) or isinstance(cap, bool) or cap < 1):
            raise InputError(source, "must be a positive integer or null", field="max_detections")
        values["max_detections"] = (cap,)
    if "tie_order" in spec:
        if spec["tie_order"] not in TIE_ORDERS:
            raise InputError(source, f"must be one of {', '.join(TIE_ORDERS)}", field="tie_order")
        values["tie_order"] = spec["tie_order"]
    if "area_ranges" in spec:
        values["area_ranges"] = _area_ranges(spec["area_ranges"], source)
    if "zero_id_unmatched" in spec:
        if not isinstance(spec["zero_id_unmatched"], bool):
            raise InputError(source, "must be true or false", field="zero_id_unmatched")
        values["zero_id_unmatched"] = spec["zero_id_unmatched"]
    if "difficult_ignored" in spec:
        if not isinstance(spec["difficult_ignored"], bool):
            raise InputError(source, "must be true or false", field="difficult_ignored")
        values["difficult_ignored"] = spec["difficult_ignored"]
    values["precision_epsilon"] = base.precision_epsilon
    return Protocol(**values)


def _area_ranges(ranges, source):
    """A custom protocol's size buckets, checked: ``(("all", 0, high), (name, low,
    high), ...)``; the first covers every box (pycocotools' ``areaRng[0]``), the names
    are distinct rule and slice names."""
    field = "area_ranges"
    if not isinstance(ranges, list) or not ranges:
        raise InputError(source, "must be a non-empty list of [name, low, high]", field=field)
    out = []
    for i, entry in enumerate(ranges):
        where = f"{field}[{i}]"
        if not isinstance(entry, list) or len(entry) != 3:
            raise InputError(source, "must be [name, low, high]", field=where)
        name, low, high = entry
        if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z0-9_.-]{1,32}", name):
            raise InputError(source, "name: 1 to 32 letters, digits, '_', '.' or '-'", field=where)
        if not all(_is_number(v) for v in (low, high)) or not 0 <= low < high:
            raise InputError(source, "low and high must be numbers, 0 <= low < high", field=where)
        out.append((name, float(low), float(high)))
    if out[0][0] != "all" or out[0][1] != 0:
        raise InputError(source, "the first range is ['all', 0, high]: every box", field=field)
    names = [name for name, _, _ in out]
    if len(set(names)) != len(names):
        raise InputError(source, "names a size bucket twice", field=field)
    return tuple(out)


def _is_number(value):
    """A finite JSON number (not a boolean). An integer beyond float64 (``1e400``
    written out) counts as infinite: every setting is read as a float."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return False
    try:
        return math.isfinite(value)
    except OverflowError:  # an int float() cannot hold
        return False


def _short(value, limit=40):
    """A value as an error shows it (an integer of thousands of digits cut short)."""
    try:
        text = repr(value)
    except ValueError:  # beyond Python's int-to-text digit limit
        return "an integer of thousands of digits"
    return text if len(text) <= limit else text[: limit - 1] + "…"
