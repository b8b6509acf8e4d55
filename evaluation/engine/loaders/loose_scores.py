"""The results file read a second time, loosely, as pycocotools reads it: the Python
number each score is (``float``, ``int`` — exact, however large — or ``bool``), for
the classes ``exact_scores`` and ``boolean_scores`` replay. Only a file holding a
``suspect`` score (or boolean candidates) is read so; a file read "as given"
(``as_given``) is laid out as the load lays it out, so rows match the loaded ones.
"""

import numpy as np

from . import (
    as_given,
    checks,
    coco_json,
    detection_blocks,
    json_literals,
    lost_ids,
    mask_results,
    result_readings,
    uncompared,
    unread_fields,
)

#: Magnitude from which an integer may have no float64 of its own (2**53 + 1 has none).
EXACT_LIMIT = 2.0**53


def suspect(score):
    """Scores that may be integers float64 rounds or ties (|score| >= 2**53, inf too)."""
    score = np.asarray(score, np.float64)
    with np.errstate(invalid="ignore"):
        return np.abs(score) >= EXACT_LIMIT


def _loose(collected):
    def decode(piece, path="", base=0, mode=mask_results.BOXES):
        if mode == mask_results.MASKS:  # a file read as masks (``mask_results``)
            loose = json_literals.decode(piece, list[mask_results.LooseMaskDetection])
            collected.append([r.score for r in loose])
            return mask_results.normalised(path, loose, base)
        if mode in result_readings.MODES:
            return result_readings.decode(piece, path, base, mode, collected)
        loose = json_literals.decode(piece, list[unread_fields.LooseDetection])
        collected.append([r.score for r in loose])
        return unread_fields.normalise_detections(path, loose, base)

    return decode


_FLOAT, _INT, _BOOL = 0, 1, 2


def _affected(path, truth, classes, wide):
    """The scored detections of ``classes`` (a second, loose read of the file), as
    columns ``image``, ``cls``, ``record``, ``position`` (index into the loaded
    predictions' columns, -1 for an unfit record a load leaves out beyond the cap —
    ``uncompared`` — but pycocotools ranks; records of unknown images or classes are
    in neither), ``row`` (the row of the file as laid out for loading, the record
    but for results read as given: ``_blocks``),
    ``score`` (float64), ``kind`` (float, int or bool in the file), ``height`` (the
    file's ``bbox[3]``), ``alias`` (``Predictions.alias``) and ``big``: record -> the
    exact Python int of every integer score of magnitude >= 2**53 (the others are exact
    in float64)."""
    parts, big, base, loaded = [], {}, 0, 0
    wanted = np.zeros(len(truth.classes), bool)
    wanted[list(classes)] = True
    for columns, values, source in _blocks(path, truth, wide):
        raw = detection_blocks.json_raw(truth, *columns, base=base)
        image, found_i = checks.resolve(path, raw.image_ids, raw.known_images, raw.locate, "", "")
        cls, found_c = checks.resolve(path, raw.class_keys, raw.known_classes, raw.locate, "", "")
        alias = np.zeros(len(found_c), bool)
        aliases = lost_ids.changed_value_classes(truth, image, raw.class_keys, found_c)
        if aliases is not None:  # under a lost category's changed value: loaded as it
            alias, found_c = aliases[0], found_c | aliases[0]
            cls = np.where(alias, aliases[1], cls)
        found = found_i & found_c
        unfit = np.zeros(len(found), bool) if raw.unfit is None else uncompared.fields(raw.unfit)
        records = base + np.arange(len(found))
        score, height = columns[3], np.asarray(columns[2], np.float64).reshape(-1, 4)[:, 3]
        if source is not None:  # rows as laid out, each carrying record source[row]
            image, cls, found, unfit, score, height, alias = (
                a[source] for a in (image, cls, found, unfit, score, height, alias)
            )
            values, records = [values[i] for i in source.tolist()], source
        loads = found & ~unfit  # unfit: left out of the loaded columns (``uncompared``)
        position = np.where(loads, loaded + np.cumsum(loads) - 1, -1)
        keep = np.flatnonzero(found)
        keep = keep[wanted[cls[keep]]]
        kinds = np.array([_kind(values[i]) for i in keep.tolist()], np.int8)
        for i in keep[(kinds == _INT) & suspect(score[keep])].tolist():
            big[int(records[i])] = values[i]
        parts.append(
            (image[keep], cls[keep], records[keep], position[keep], base + keep)
            + (score[keep], kinds, height[keep], alias[keep])
        )
        base += len(score)
        loaded += int(loads.sum())
    names = ("image", "cls", "record", "position", "row", "score", "kind", "height", "alias")
    rows = {n: np.concatenate([p[j] for p in parts]) for j, n in enumerate(names)}
    return rows, big


def _blocks(path, truth, wide):
    """``(columns, Python scores, source)`` per block of the file, read loosely; a file
    read as given (``as_given``: its ids reach across the file) as one block laid out
    as pycocotools takes its records, ``source[row]`` the record each row carries
    (None: rows are the records)."""
    collected = []
    blocks = coco_json.detection_blocks(path, wide, decode=_loose(collected))
    for columns in blocks:
        if columns[5] != result_readings.GIVEN:
            yield columns, collected.pop(), None
            collected.clear()
            continue
        parts = [columns, *blocks]
        columns = tuple(coco_json._joined(c, parts) for c in zip(*parts))
        values = [v for block in collected for v in block]
        source, _ = as_given.layout(path, detection_blocks.json_raw(truth, *columns), "drop")
        yield columns, values, source
        return


def _kind(value):
    return _BOOL if type(value) is bool else _INT if type(value) is int else _FLOAT
