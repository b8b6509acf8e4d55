"""Where an error in a slice of a detections file lies (``Position``, ``piece_error``,
``trailing_comma``) and whether a slice's error is only its ending early
(``cut_short``, ``syntax_error``): the helpers of ``results_stream``'s reader."""

import re

import msgspec

from ..errors import InputError
from . import json_literals


class Position:
    """Line and column of absolute byte offsets, for bytes already read and dropped."""

    def __init__(self, offset):
        self.offset = offset  # absolute offset of buf[0]
        self.lines = 0  # newlines before it
        self.line_start = 0  # absolute offset just after the last of them

    def advance(self, consumed, end=None):
        """Move past ``consumed`` (its first ``end`` bytes: no copy of a slice)."""
        end = len(consumed) if end is None else end
        newlines = consumed.count(b"\n", 0, end)
        if newlines:
            self.lines += newlines
            self.line_start = self.offset + consumed.rfind(b"\n", 0, end) + 1
        self.offset += end

    def locate(self, buf, k):
        """(line, column) of buf[k], 1-based."""
        nl = buf.rfind(b"\n", 0, k)
        line = self.lines + buf.count(b"\n", 0, k) + 1
        column = k - nl if nl >= 0 else self.offset + k - self.line_start + 1
        return line, column


def piece_error(path, error, buf, where, shift):
    """An InputError for a slice of ``buf`` (decoded with ``shift`` bytes in front of
    it) that failed at its byte ``k + shift``."""
    text = str(error)
    if "truncated" in text:
        return InputError(path, "the JSON ends early: the file looks truncated")
    m = re.search(r"\(byte ([0-9]+)\)", text)
    if not m:
        return InputError(path, f"not valid JSON: {text}")
    line, column = where.locate(buf, max(int(m.group(1)) - shift, 0))
    reason = text.split(":", 1)[-1].split("(byte")[0].strip()
    return InputError(path, f"not valid JSON: {reason} at line {line}, column {column}")


def trailing_comma(path, buf, where):
    """The error of a comma after the last record (``[{...},]``): Python's ``json``
    (so pycocotools 2.0.11) raises "Expecting value" at the closing bracket, RFC 8259
    section 5 allows no empty element. ``buf`` is the rest after the cut: "[", blanks,
    "]"."""
    k = len(buf) - len(bytes(buf[1:]).lstrip())
    line, column = where.locate(buf, k)
    return InputError(
        path,
        f"not valid JSON: trailing comma in array at line {line}, column {column}",
    )


_LITERALS = (b"NaN", b"Infinity")  # as Python's json reads them (-Infinity: "-" first)


def cut_short(error, buf):
    """Whether msgspec's error on ``buf`` is only its ending early: truncated, failing
    at the last byte or just past it (a number cut as ``0.`` or ``1e``), or at a
    ``NaN``/``Infinity`` literal that the end cuts (``Na``, ``-Inf``: msgspec calls
    its first letter an invalid character)."""
    n = len(buf)
    m = re.search(r"\(byte ([0-9]+)\)", str(error))
    if "truncated" in str(error):
        return True
    if not m:
        return False
    at = int(m.group(1))
    tail = bytes(buf[at:])
    return at >= n - 1 or any(len(tail) < len(w) and w.startswith(tail) for w in _LITERALS)


def syntax_error(buf, typed=msgspec.Raw):
    """msgspec's DecodeError of ``buf`` (decoded as ``typed``: no Python objects are
    built for Raw, nor for the typed detections, whose first mismatch stops them)
    unless it only ends early, else None; raises a ValidationError of ``typed``. The
    buffer is read in place: a copy is made only for one holding a literal
    (``json_literals.check_syntax``)."""
    view = memoryview(buf)
    try:
        msgspec.json.decode(view, type=typed)
        return None
    except msgspec.ValidationError:  # a DecodeError too: the caller's
        raise
    except msgspec.DecodeError as e:
        if cut_short(e, buf):
            return None
    finally:
        view.release()
    try:
        json_literals.check_syntax(bytes(buf))
    except msgspec.DecodeError as e:
        return None if cut_short(e, buf) else e
    return None
