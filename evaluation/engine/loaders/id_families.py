"""A JSON split's id families: typed keys where the ids are not all 64-bit integers
(``ids``), pycocotools' order of them, and the categories a NaN makes ``np.unique``
give more than once. ``truth_columns.read_truth`` calls these on the images' and categories' ids."""

import numpy as np

from ..errors import InputError
from . import ids as ids_module


def typed_family(path, cols, defining, refs, locate, what):
    """An id family of a JSON split (the images' ids and the boxes' and regions'
    references to them; the categories' ids and the boxes' references) that is not all
    64-bit integers becomes typed keys throughout (``ids``); its type is returned
    (``""`` for int64 ids, left as they are). The defining ids must be all numbers or
    all text: pycocotools sorts them, and Python cannot sort a mix."""
    names = (defining, *refs)
    if all(cols[name].dtype.kind == "i" for name in names):
        return ""
    for name in names:
        cols[name] = ids_module.typed_keys(cols[name])
    keys = cols[defining]
    marks = np.array([key[0] for key in keys.tolist()], dtype=object)
    null = marks == ids_module.NULL
    if null.any():
        raise InputError(
            path,
            f"{what} ids cannot be null (pycocotools sorts them; null names nothing)",
            record=locate(int(np.flatnonzero(null)[0])),
            field="id",
        )
    mixed = np.flatnonzero(marks != marks[0]) if len(marks) else []
    if len(mixed):
        i = int(mixed[0])
        raise InputError(
            path,
            f"{what} ids mix numbers and text ({ids_module.shown(keys[i])} here, "
            f"{ids_module.shown(keys[0])} at {locate(0)}): pycocotools sorts them and Python "
            "cannot sort such a mix",
            record=locate(i),
            field="id",
        )
    return ids_module.family_type(keys)


def order(values, id_type, listed=None, distinct=True):
    """Stable ascending order of a family's defining ids (pycocotools' order).
    ``listed``: the family's keys as the file lists them (before ``last_entries``),
    whose order ``sorted`` sees where a NaN disturbs it (``ids.sort_order``);
    ``distinct``: pycocotools lists each once (images: its dict's keys), else as
    listed (categories: ``getCatIds``)."""
    if not id_type:
        return np.argsort(values, kind="stable")
    return ids_module.sort_order(values, _written(values, listed, distinct))


def _written(values, listed, distinct):
    """Positions into ``values`` in the order ``listed`` gives them, or None (no NaN)."""
    if listed is None or not np.any(values == ids_module.NUMBER + "nan"):
        return None
    position = {key: n for n, key in enumerate(values.tolist())}
    written = [position[key] for key in listed.tolist()]
    return list(dict.fromkeys(written)) if distinct else written


def repeated_entries(class_ids, listed):
    """Per class (``class_ids``, typed keys in the engine's order), how many entries
    pycocotools' ``np.unique(sorted(catIds))`` gives it, or None where each class is
    one. A NaN among ids beyond 64 bits (an object array, sorted by Python's
    comparisons, which a NaN disturbs) can leave two equal ids apart (``3`` and
    ``3.0``), and a NaN listed twice is two entries (NaN != NaN); three times, three.
    pycocotools evaluates the category once per entry, every entry finding the same
    boxes and detections (its dicts find ``3.0`` under ``3``, the file's NaN by
    identity): identical columns of its per-class arrays, counted that often in every
    mean over categories (red team audit11 F4; ``GroundTruth.class_repeats``)."""
    written = _written(class_ids, listed, distinct=False)
    if written is None:
        return None
    values = [ids_module.key_value(k) for k in class_ids.tolist()]
    entries = ids_module.nan_entries(values, written)
    if entries is None:
        return None
    repeats = np.bincount(np.array(entries, np.int64), minlength=len(values))
    return repeats if (repeats != 1).any() else None
