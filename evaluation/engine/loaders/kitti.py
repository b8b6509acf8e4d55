"""KITTI object label files: one ``NNNNNN.txt`` per image, one object per line.

The layout of the KITTI object development kit's readme (Geiger et al., CVPR 2012):
``type truncated occluded alpha x1 y1 x2 y2 h w l x y z rotation_y`` — 15 fields;
detections add a 16th, the score. Boxes are pixel corners; only the 2D part is used
here, the 3D fields must still be numbers. ``DontCare`` objects (any letter case, as
the devkit compares types case-insensitively) are the image's don't-care regions.

A truncation or occlusion of -1 (what KITTI-style tools write where they know none,
as on ``DontCare`` lines) is read as "not given". The devkit's level filters only
drop a box whose value *exceeds* a level's maximum, so -1 and "not given" pass every
level alike, and a split without attributes converts to KITTI and back unchanged.
"""

from ..errors import InputError
from .label_lines import field_count, integer, lines, number

LAYOUT = "type truncated occluded alpha x1 y1 x2 y2 h w l x y z rotation_y"
_NUMERIC = ("alpha", "x1", "y1", "x2", "y2", "h", "w", "l", "x", "y", "z", "rotation_y")
DONT_CARE = "dontcare"
NOT_GIVEN = float("nan")


def _box(path, name, line, fields):
    values = {f: number(path, name, line, f, v) for f, v in zip(_NUMERIC, fields[3:15])}
    return [values["x1"], values["y1"], values["x2"], values["y2"]]  # corners as read


def parse_truth(path, name, data, out):
    """Append one label file's objects (and don't-care regions) to ``out``'s lists."""
    for line, fields in lines(path, name, data):
        if len(fields) == 16:
            raise InputError(
                path,
                "16 fields: a ground-truth line has 15 (the 16th, a score, belongs to detections)",
                record=f"{name} line {line}",
            )
        field_count(path, name, line, fields, (15,), LAYOUT)
        box = _box(path, name, line, fields)
        if fields[0].lower() == DONT_CARE:
            out["regions"].append((name, line, box))
            continue
        truncation = number(path, name, line, "truncated", fields[1])
        occlusion = integer(path, name, line, "occluded", fields[2])
        truncation = NOT_GIVEN if truncation == -1 else truncation
        occlusion = NOT_GIVEN if occlusion == -1 else occlusion
        out["objects"].append((name, line, fields[0], box, occlusion, truncation))


def parse_detections(path, name, data, out):
    """Append one detection file's records: ``(name, line, type, box, score)``."""
    for line, fields in lines(path, name, data):
        field_count(path, name, line, fields, (16,), LAYOUT + " score")
        number(path, name, line, "truncated", fields[1])
        number(path, name, line, "occluded", fields[2])
        box = _box(path, name, line, fields)
        score = number(path, name, line, "score", fields[15])
        out.append((name, line, fields[0], box, score))


def looks_like(fields):
    """A first label line in KITTI layout: a type name and 14 or 15 numbers."""
    return len(fields) in (15, 16) and not _is_number(fields[0])


def _is_number(text):
    try:
        float(text)
    except ValueError:
        return False
    return True
