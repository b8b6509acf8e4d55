"""Small JSON files the command line reads whole: a custom protocol (``--protocol
FILE``) and the results ``explain`` compares. Every way such a file can be unreadable
is an ``InputError`` naming it.

Read as Python's ``json`` module reads text (``NaN`` and ``Infinity`` included, as in
the engine's loaders): UTF-8 with or without a byte-order mark; UTF-16 and UTF-32 files
are named as such (``checks.text_start``), as the loaders name them. An integer of more
digits than Python's limit for integer string conversion is refused as the loaders refuse
it (``json_bytes.Checker``), naming its field, line and column.
"""

import json

from .errors import InputError
from .loaders import checks, json_bytes, json_literals


def read(path, what="valid JSON", cannot_open="cannot open"):
    """The JSON value of the file at ``path``; ``what`` names the expected content in
    messages ("a JSON result"), ``cannot_open`` the file that cannot be opened."""
    try:
        with open(path, "rb") as f:
            data = f.read()
    except OSError as e:
        raise InputError(path, f"{cannot_open}: {e.strerror}") from None
    skip = checks.text_start(path, data[:4])
    data = data[skip:]
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        line = data[: e.start].count(b"\n") + 1
        raise InputError(
            path, f"not {what}: not UTF-8 text (byte {e.start}, line {line}); save it as UTF-8"
        ) from None
    try:
        return json.loads(text)
    except json.JSONDecodeError as e:
        raise InputError(
            path, f"not {what}: {e.msg} at line {e.lineno}, column {e.colno}"
        ) from None
    except ValueError as e:  # an integer beyond sys.get_int_max_str_digits()
        checker = json_bytes.Checker(path, skip)
        checker.feed(data)  # raises InputError naming the field, line and column
        raise InputError(path, f"not {what}: {e}") from None
    except RecursionError:
        reason, at = json_literals.nesting(data)
        line = data[:at].count(b"\n") + 1
        column = len(data[data.rfind(b"\n", 0, at) + 1 : at].decode()) + 1
        raise InputError(path, f"not {what}: {reason} at line {line}, column {column}") from None
