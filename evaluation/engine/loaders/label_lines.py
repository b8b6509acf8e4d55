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


def lines(path, name, data):
    """``(line_number, fields)`` of each non-blank line of a member."""
    for number, line in enumerate(decode_text(path, name, data).splitlines(), 1):
        fields = line.split()
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
