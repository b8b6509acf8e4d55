"""YOLO label folders: one ``<image>.txt`` per image, ``class cx cy w h [score]``.

Coordinates are normalised by the image's width and height (box centre and size,
0-1), class is a 0-based index into the class-names file. Files without a line are
images without objects. Detections carry a sixth field, the confidence, last (the
layout the common YOLO tools write when asked to save confidences). Like those tools'
dataset checks, a normalised value outside 0-1 is refused.

Class names: ``classes.txt`` or ``*.names`` (one name a line), or the ``names:``
entry of ``data.yaml`` / ``dataset.yaml`` (a ``[a, b]`` list, ``- a`` lines or
``0: a`` lines), or the ``classes`` argument.
"""

import re

from ..errors import InputError
from .label_lines import field_count, integer, lines, number
from .members import decode_text, extension

LAYOUT = "class cx cy w h"
NAME_FILES = ("classes.txt",)
YAML_FILES = ("data.yaml", "dataset.yaml", "data.yml", "dataset.yml")


def is_names_file(name):
    base = name.rsplit("/", 1)[-1].lower()
    return base in NAME_FILES or base in YAML_FILES or extension(name) == ".names"


def class_names(path, members):
    """The class names from the folder's names file, or None if it has none."""
    found = [n for n in members.names if is_names_file(n)]
    if len(found) > 1:
        raise InputError(
            path, f"several class-name files ({', '.join(found)}); keep one", record=found[1]
        )
    if not found:
        return None
    name = found[0]
    text = decode_text(path, name, members.read(name))
    if name.lower().endswith((".yaml", ".yml")):
        names = _yaml_names(path, name, text)
    else:
        names = [line.strip() for line in text.splitlines() if line.strip()]
    if not names:
        raise InputError(path, "the class-name file names no class", record=name)
    if len(set(names)) != len(names):
        raise InputError(path, "class names must be unique", record=name)
    return names


def _yaml_names(path, name, text):
    """The ``names:`` entry of a dataset YAML file, in its three common forms."""
    rows = text.splitlines()
    for i, row in enumerate(rows):
        m = re.match(r"^names\s*:\s*(.*)$", row)
        if not m:
            continue
        inline = m[1].split("#", 1)[0].strip()
        if inline.startswith("["):
            return [_unquote(v) for v in inline.strip("[]").split(",") if v.strip()]
        names, indexed = [], {}
        for j, item in enumerate(rows[i + 1 :], i + 2):
            if not item.strip():
                continue
            if not item[:1].isspace():
                break
            listed = re.match(r"^\s*-\s*(.+)$", item)
            keyed = re.match(r"^\s*([0-9]+)\s*:\s*(.+)$", item)
            _ascii_index(path, name, j, item)
            if listed:
                names.append(_unquote(listed[1]))
            elif keyed:
                indexed[int(keyed[1])] = _unquote(keyed[2])
        if indexed:
            if sorted(indexed) != list(range(len(indexed))):
                raise InputError(
                    path, "class indices must run 0, 1, 2, ... without gaps", record=name
                )
            return [indexed[k] for k in range(len(indexed))]
        return names
    raise InputError(path, "no 'names:' entry", record=name)


def _ascii_index(path, name, line, item):
    """Refuse a ``names:`` key written in digits other than ASCII (``٣: car``): ``int``
    would read it as index 3, where YAML reads text."""
    key = re.match(r"^\s*([^\s:#]+)\s*:", item)
    if key and key[1].isdecimal() and not key[1].isascii():
        raise InputError(
            path,
            f"a class index is written in the digits 0-9, got {key[1]!r}",
            record=f"{name} line {line}",
            field="names",
        )


def _unquote(value):
    return value.split("#", 1)[0].strip().strip("'\"")


def parse(path, name, data, n_classes, detections, out):
    """Append ``(name, line, class_index, (cx, cy, w, h), score or None)`` records."""
    count = (6,) if detections else (5,)
    layout = LAYOUT + (" score" if detections else "")
    for line, fields in lines(path, name, data):
        field_count(path, name, line, fields, count, layout)
        cls = integer(path, name, line, "class", fields[0])
        if not 0 <= cls < n_classes:
            raise InputError(
                path,
                f"class index {cls} is not in the class-name file (0 to {n_classes - 1})",
                record=f"{name} line {line}",
                field="class",
            )
        box = []
        for field, text in zip(("cx", "cy", "w", "h"), fields[1:5]):
            value = number(path, name, line, field, text)
            if not 0 <= value <= 1:
                raise InputError(
                    path,
                    f"normalised coordinates lie within 0-1, got {text}",
                    record=f"{name} line {line}",
                    field=field,
                )
            box.append(value)
        score = number(path, name, line, "score", fields[5]) if detections else None
        out.append((name, line, cls, box, score))


def looks_like(fields):
    """A first label line in YOLO layout: an integer class and 4 or 5 numbers."""
    if len(fields) not in (5, 6) or not fields[0].isdigit():
        return False
    try:
        [float(v) for v in fields[1:]]
    except ValueError:
        return False
    return True


def to_pixels(box, width, height):
    """Normalised ``(cx, cy, w, h)`` -> pixel ``[x, y, w, h]``."""
    cx, cy, w, h = box
    return [(cx - w / 2) * width, (cy - h / 2) * height, w * width, h * height]
