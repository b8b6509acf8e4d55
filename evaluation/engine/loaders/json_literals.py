"""The non-standard number literals ``NaN``, ``Infinity`` and ``-Infinity``, numbers
beyond float64's range such as ``1e400``, and lone surrogate escapes in strings.

Python's ``json`` module — which pycocotools 2.0.11 reads both files with — accepts
these (``NaN`` → nan, ``Infinity`` → inf, ``1e400`` → inf; Python ``json`` module
documentation: "It also understands NaN, Infinity, and -Infinity as their
corresponding float values"), so a file holding them is a file the reference scores.
msgspec refuses them. Clean slices keep msgspec's fast path; a slice it refuses is
looked at again here:

* syntax: the literals outside strings are replaced by JSON strings of the *same
  length* (``"N"``, ``"Infini"``, ``"-Infini"``) and msgspec checks that, so any other
  syntax error keeps its byte position (and thus its line and column);
* values: the slice is decoded by ``json.loads`` (only when that refuses it is its
  syntax checked as above, for msgspec's error at its position) and converted to
  the typed records by ``msgspec.convert``, whose type errors name the same path
  (``$[3].bbox[2]``) as msgspec's own decoding.

A string may also hold an escaped UTF-16 surrogate without its partner (``"\\ud800"``
alone): valid JSON (RFC 8259 section 8.2 allows it), read by Python's ``json`` into a
``str`` holding that code point, so pycocotools scores such a file; msgspec refuses it
("truncated", "invalid utf-16 surrogate pair"). A slice holding one takes the same
slow path: for a syntax check it is replaced by ``\\ufffd`` (same length), and the
values come from ``json.loads``, so the engine holds the very ``str`` Python's ``json``
gives — equal, hashed and sorted (by code point, U+D800..U+DFFF between U+D7FF and
U+E000) exactly as pycocotools compares them. Such text cannot be encoded as UTF-8:
everything the engine writes shows a surrogate as its escape (``ids.escaped``).

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

#: A string, also one the data ends inside (a slice cut inside it: msgspec then calls
#: the slice truncated, and the reader reads on), so no literal inside a string is
#: ever masked; or a literal.
_TOKENS = re.compile(rb'"(?:[^"\\]|\\.)*(?:"|\\?\Z)|-?Infinity|NaN', re.DOTALL)
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


#: One escape of a string, in order: a surrogate pair, a lone surrogate (group 1), or
#: any other escape (an escaped backslash included, so ``\\\\ud800`` is no escape).
_ESCAPE = re.compile(  # one literal prefix, so the engine skips to each backslash
    rb"\\(?:u[dD][89abAB][0-9a-fA-F]{2}\\u[dD][c-fC-F][0-9a-fA-F]{2}"
    rb"|(u[dD][89a-fA-F][0-9a-fA-F]{2})|u[0-9a-fA-F]{4}|.)",
    re.DOTALL,
)
_SURROGATE = re.compile(rb"\\u[dD][89a-fA-F]")
#: A lone surrogate escape's stand-in for the syntax check: a valid escape, same length.
_STAND_IN_ESCAPE = b"\\ufffd"


def has_surrogate(data):
    """Whether ``data`` may hold a lone UTF-16 surrogate escape (cheap: a search)."""
    return _SURROGATE.search(bytes(data)) is not None


def has_literal(data):
    """Whether ``data`` may hold a literal (cheap: a substring test)."""
    data = bytes(data)
    return b"NaN" in data or b"Infinity" in data


def masked(data):
    """``data`` with each literal outside strings replaced by a string of equal length,
    and each lone surrogate escape by a valid escape of equal length (escapes are read
    in order over the whole text: a backslash outside a string is an error either way,
    at the same byte)."""
    data = bytes(data)
    if has_surrogate(data):
        data = _ESCAPE.sub(lambda m: _STAND_IN_ESCAPE if m[1] else m[0], data)
    if has_literal(data):
        data = _TOKENS.sub(lambda m: _STAND_IN.get(m[0], m[0]), data)
    return data


def _unusual(data):
    return has_literal(data) or has_surrogate(data)


def check_syntax(data):
    """msgspec's syntax check (raises its DecodeError), the literals allowed."""
    try:
        try:
            msgspec.json.decode(data, type=msgspec.Raw)
        except msgspec.DecodeError:
            if not _unusual(data):
                raise
            msgspec.json.decode(masked(data), type=msgspec.Raw)
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
        if not (_out_of_range(e) or _unusual(data)):
            raise
        try:
            # strict UTF-8, as pycocotools' text-mode ``open``: an encoded surrogate
            # (bytes ED A0 80) is invalid UTF-8 there, though ``json.loads(bytes)``
            # would pass it
            text = bytes(data).decode("utf-8")
            value = json.loads(text)  # it reads what Python's json reads: no check first
        except (ValueError, RecursionError) as failed:
            check_syntax(data)  # a syntax error: msgspec's, at its own position
            if isinstance(failed, UnicodeDecodeError):  # msgspec's own words for it
                raise msgspec.DecodeError("Invalid UTF-8 encoded string") from None
            raise e from None
        return _convert(value, text, type)


def _convert(value, text, type):
    """``msgspec.convert``, which encodes a key, or a text value where another type is
    expected, as UTF-8 and so fails on a surrogate: then again with the keys escaped
    (the keys read into typed records are ASCII field names, so only keys nothing
    reads change), and if a text value is in the wrong place, everything escaped, for
    msgspec's ValidationError naming it."""
    try:
        return msgspec.convert(value, type=type)
    except UnicodeEncodeError:
        pass
    try:
        return msgspec.convert(json.loads(text, object_pairs_hook=_escaped_keys), type=type)
    except UnicodeEncodeError:
        msgspec.convert(_escaped_all(value), type=type)
        raise  # not reached: a value no typed field takes is a ValidationError


def _escaped(text):
    return text.encode("utf-8", "backslashreplace").decode("utf-8")


def _escaped_keys(pairs):
    return {_escaped(k): v for k, v in pairs}


def _escaped_all(value):
    if isinstance(value, str):
        return _escaped(value)
    if isinstance(value, list):
        return [_escaped_all(v) for v in value]
    if isinstance(value, dict):
        return {_escaped(k): _escaped_all(v) for k, v in value.items()}
    return value
