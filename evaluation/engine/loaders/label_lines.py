"""Whitespace-separated label lines (KITTI, YOLO), checked field by field.

Every error names the member file and its line: ``labels.zip: 000012.txt line 3:
field 'x_max': expected a number, got 'abc'``.
"""

import re

import numpy as np

from ..errors import InputError
from .members import decode_text

#: A decimal number as C's ``strtod`` reads it (the devkits read with ``fscanf``):
#: no digit-group underscores, which Python's ``float`` would take, and ASCII digits
#: only, as ``ids.INTEGER``: ``\\d`` matches any Unicode decimal digit (Python's ``re``
#: documentation, from memory), and ``float("٣00")`` is 300.0.
_NUMBER = re.compile(r"[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?\Z")
_INTEGER = re.compile(r"[+-]?[0-9]+\Z")


#: Lines end at \n, \r\n or \r (Python's universal newlines); fields are runs between
#: C's whitespace in the "C" locale: space, \t, \n, \v, \f, \r (C standard
#: ``isspace``, from memory), the separators of the ``fscanf`` the KITTI devkit reads
#: with. Python's ``str.split()`` and ``str.splitlines()`` also take a no-break space,
#: the ideographic space, NEL, \x1c-\x1f and others (red team audit11 F7): here such
#: a character stays inside its field, which is then refused naming file, line, field.
_LINE_BREAK = re.compile(r"\r\n|\r|\n")
_FIELD = re.compile(r"[^ \t\n\v\f\r]+")


def lines(path, name, data):
    """``(line_number, fields)`` of each non-blank line of a member."""
    for number, line in enumerate(_LINE_BREAK.split(decode_text(path, name, data)), 1):
        fields = _FIELD.findall(line)
        if fields:
            yield number, fields


def number(path, name, line, field, text):
    if not _NUMBER.match(text):
        raise InputError(
            path, f"expected a number, got {text!r}", record=f"{name} line {line}", field=field
        )
    value = float(text)
    if not np.isfinite(value):
        raise InputError(path, "must be a finite number", record=f"{name} line {line}", field=field)
    return value


def integer(path, name, line, field, text):
    if not _INTEGER.match(text):
        raise InputError(
            path, f"expected an integer, got {text!r}", record=f"{name} line {line}", field=field
        )
    return int(text)


def field_count(path, name, line, fields, allowed, layout):
    if len(fields) not in allowed:
        expected = " or ".join(str(n) for n in allowed)
        raise InputError(
            path,
            f"expected {expected} fields ({layout}), got {len(fields)}",
            record=f"{name} line {line}",
        )
