"""The non-standard number literals ``NaN``, ``Infinity`` and ``-Infinity``, and numbers
beyond float64's range such as ``1e400``.

Python's ``json`` module — which pycocotools 2.0.11 reads both files with — accepts
these (``NaN`` → nan, ``Infinity`` → inf, ``1e400`` → inf; Python ``json`` module
documentation: "It also understands NaN, Infinity, and -Infinity as their
corresponding float values"), so a file holding them is a file the reference scores.
msgspec refuses them. Clean slices keep msgspec's fast path; a slice it refuses is
looked at again here:

* syntax: the literals outside strings are replaced by JSON strings of the *same
  length* (``"N"``, ``"Infini"``, ``"-Infini"``) and msgspec checks that, so any other
  syntax error keeps its byte position (and thus its line and column);
* values: a slice whose syntax holds is decoded by ``json.loads`` and converted to
  the typed records by ``msgspec.convert``, whose type errors name the same path
  (``$[3].bbox[2]``) as msgspec's own decoding.

Nesting deeper than the interpreter's recursion limit lets a reader follow (about a
thousand levels: msgspec and Python's ``json`` alike raise RecursionError, so
pycocotools refuses such a file too) is a syntax error here: msgspec's DecodeError
naming the depth and the byte where it is first reached, so callers report line and
column as for any other.
"""

import json
import re
import sys

import msgspec

_TOKENS = re.compile(rb'"(?:[^"\\]|\\.)*"|-?Infinity|NaN', re.DOTALL)
_STAND_IN = {b"NaN": b'"N"', b"Infinity": b'"Infini"', b"-Infinity": b'"-Infini"'}
_NESTING = re.compile(rb'"(?:[^"\\]|\\.)*"|[\[\]{}]', re.DOTALL)


def too_deep(data):
    """The DecodeError of ``data`` that a reader gave up on with a RecursionError."""
    reason, at = nesting(data)
    return msgspec.DecodeError(f"JSON is malformed: {reason} (byte {at})")


def nesting(data):
    """Why a reader gave up on ``data`` with a RecursionError, and the byte of the first
    bracket nested deeper than the recursion limit (or, when the reader gave up earlier,
    deep in the stack, the first one of the deepest nesting)."""
    limit = sys.getrecursionlimit()
    depth = deepest = at = 0
    for m in _NESTING.finditer(bytes(data)):
        if m[0] in (b"[", b"{"):
            depth += 1
            if depth > deepest:
                deepest, at = depth, m.start()
                if depth > limit:
                    break
        elif m[0] in (b"]", b"}"):
            depth -= 1
    levels = f"deeper than {limit} levels" if deepest > limit else f"{deepest} levels deep"
    return (
        f"nested {levels}, more than a JSON reader follows (Python's recursion limit, "
        f"{limit}, bounds its json module too)"
    ), at


_SURROGATE = re.compile(rb"\\u[dD]([89a-fA-F])[0-9a-fA-F]{2}")


def lone_surrogate(data):
    """Byte offset of the first escape of a UTF-16 surrogate without its partner
    (``\\ud800`` alone), or None. msgspec calls such text "truncated"; Python's json
    reads it into a string no UTF-8 file can hold, so it is refused here, located."""
    data = bytes(data)
    paired_at = -1
    for m in _SURROGATE.finditer(data):
        start = m.start()
        slashes = len(data[:start]) - len(data[:start].rstrip(b"\\"))
        if slashes % 2 or start == paired_at:  # an escaped backslash, or a pair's 2nd
            continue
        high = m[1] in b"89abAB"
        low_next = _SURROGATE.match(data, m.end())
        if high and low_next and low_next[1] not in b"89abAB":
            paired_at = m.end()
            continue
        return start
    return None


def _surrogate_error(error, data):
    """msgspec's "truncated" for a lone surrogate escape, said as what it is."""
    if "truncated" not in str(error):
        return error
    at = lone_surrogate(data)
    if at is None:
        return error
    return msgspec.DecodeError(
        "JSON is malformed: a lone UTF-16 surrogate escape in a string, which no UTF-8 "
        f"text can hold (byte {at})"
    )


def has_literal(data):
    """Whether ``data`` may hold a literal (cheap: a substring test)."""
    data = bytes(data)
    return b"NaN" in data or b"Infinity" in data


def masked(data):
    """``data`` with each literal outside strings replaced by a string of equal length."""
    return _TOKENS.sub(lambda m: _STAND_IN.get(m[0], m[0]), bytes(data))


def check_syntax(data):
    """msgspec's syntax check (raises its DecodeError), the literals allowed."""
    try:
        try:
            msgspec.json.decode(data, type=msgspec.Raw)
        except msgspec.DecodeError as e:
            if not has_literal(data):
                raise _surrogate_error(e, data) from None
            try:
                msgspec.json.decode(masked(data), type=msgspec.Raw)
            except msgspec.DecodeError as masked_error:
                raise _surrogate_error(masked_error, data) from None
    except RecursionError:
        raise too_deep(data) from None


def _out_of_range(error):
    return isinstance(error, msgspec.ValidationError) and str(error).startswith(
        "Number out of range"
    )


def decode(data, type):
    """``msgspec.json.decode(data, type=type)``, the literals and out-of-range numbers
    read as Python's ``json`` reads them."""
    try:
        return _decode(data, type)
    except RecursionError:
        raise too_deep(data) from None


def _decode(data, type):
    try:
        return msgspec.json.decode(data, type=type)
    except (msgspec.DecodeError, msgspec.ValidationError) as e:
        if isinstance(e, msgspec.ValidationError) and not _out_of_range(e):
            raise
        if not (_out_of_range(e) or has_literal(data)):
            raise _surrogate_error(e, data) from None
        check_syntax(data)  # another syntax error: raised at its own position
        try:
            value = json.loads(bytes(data))
        except (ValueError, RecursionError):  # e.g. invalid UTF-8: msgspec's message
            raise e from None
        return msgspec.convert(value, type=type)
