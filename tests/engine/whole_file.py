"""The reference the bounded loaders are held to: the message a whole-file msgspec
decode of the document gives for a syntax error (its line and column)."""

import re

from evaluation.engine import InputError


def decode_error(path, error, data):
    """The located message of a ``msgspec.DecodeError`` raised by decoding all of ``data``."""
    text = str(error)
    m = re.search(r"\(byte (\d+)\)", text)
    if "truncated" in text:
        return InputError(path, "the JSON ends early: the file looks truncated")
    if not m:
        return InputError(path, f"not valid JSON: {text}")
    offset = int(m.group(1))
    line = 1 + data.count(b"\n", 0, offset)
    column = offset - (data.rfind(b"\n", 0, offset) + 1) + 1
    reason = text.split(":", 1)[-1].split("(byte")[0].strip()
    return InputError(path, f"not valid JSON: {reason} at line {line}, column {column}")
