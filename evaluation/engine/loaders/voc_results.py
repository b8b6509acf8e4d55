"""PASCAL VOC detection result files: one ``<comp>_det_<set>_<class>.txt`` per class.

The layout of the VOC development kit (Everingham et al., IJCV 2010; ``VOCevaldet.m``
reads a class's file with ``textread(..., '%s %f %f %f %f %f')``; the file name is
``VOCopts.detrespath``, ``%s_det_%s_%s.txt`` of the competition id, the image set and
the class): one detection per line, ``image_id score xmin ymin xmax ymax``, the box
as 1-based, pixel-inclusive corners. The corners are kept as given (``x_max - x_min``
wide, as the CSV reader keeps them, and the corners themselves where ``x_min + w``
misses ``x_max``: ``Predictions.corners``); the VOC protocols add the devkit's +1 when
they measure overlap on them, so the numbers equal those of the same corners given as CSV or COCO
JSON under the same protocol. Within a class, detections keep their file order, the
order the devkit's stable sort starts from.
"""

import posixpath

import numpy as np

from ..boxes import from_corners
from ..errors import InputError
from .label_lines import field_count, lines, number
from .members import RESULT_FILE_NAME as FILE_NAME

LAYOUT = "image_id score xmin ymin xmax ymax"


def is_result_file(name):
    return FILE_NAME.match(posixpath.basename(name)) is not None


def class_of(path, name, classes):
    """The class a result file is named for: the longest of the split's class names
    that the name ends with after ``_det_<set>_`` (a class name may hold ``_``); else
    what follows the image set, left for the caller to refuse or drop as unknown."""
    rest = FILE_NAME.match(posixpath.basename(name)).group("rest")
    if "_" not in rest:
        raise InputError(
            path,
            "a VOC result file is named <comp>_det_<set>_<class>.txt; this name has no "
            "image set and class after '_det_'",
            record=name,
        )
    ends = [c for c in classes if rest.endswith("_" + c) and len(rest) > len(c) + 1]
    return max(ends, key=len) if ends else rest.split("_", 1)[1]


def parse(path, name, data, class_name, out):
    """Append one result file's records: ``(name, line, class, corners as read,
    score, image id)``; errors name the file, its line and the field."""
    for line, fields in lines(path, name, data):
        field_count(path, name, line, fields, (6,), LAYOUT)
        score = number(path, name, line, "score", fields[1])
        x1, y1, x2, y2 = (
            number(path, name, line, field, text)
            for field, text in zip(("xmin", "ymin", "xmax", "ymax"), fields[2:6])
        )
        out.append((name, line, class_name, [x1, y1, x2, y2], score, fields[0]))


def read_detections(path, members, names, truth):
    """The detections of the result files ``names`` (``members``' names) of a folder or
    zip: ``(image ids, class names, xywh boxes, scores, locate, dropped, corners as
    read)``, as ``label_folders.read_detections`` gives them."""
    if not names:
        raise InputError(
            path, "no VOC result file (<comp>_det_<set>_<class>.txt) in the folder or zip"
        )
    records, seen = [], {}
    for name in names:
        class_name = class_of(path, name, truth.classes)
        earlier = seen.setdefault(class_name, name)
        if earlier != name:
            raise InputError(
                path,
                f"two result files for class {class_name!r} ({earlier} and {name})",
                record=name,
            )
        parse(path, name, members.read(name), class_name, records)
    where = [f"{r[0]} line {r[1]}" for r in records]
    corners = np.array([r[3] for r in records], np.float64).reshape(-1, 4)
    return (
        [r[5] for r in records],
        [r[2] for r in records],
        from_corners(corners),
        np.array([r[4] for r in records], np.float64),
        lambda i: where[i],
        0,
        corners,
    )
