"""External image ids typed like the split's: integers when every id is one, else text."""

import re

import numpy as np

INTEGER = re.compile(r"^[+-]?\d+$")
INT64 = (-(2**63), 2**63 - 1)


def csv_ids(values):
    """Integer ids when every id is an integer (sorted numerically), else strings."""
    if values and all(INTEGER.match(v) for v in values):
        numbers = [int(v) for v in values]
        if INT64[0] <= min(numbers) and max(numbers) <= INT64[1]:
            return np.array(numbers, np.int64)
    return np.array(values, dtype=object).astype(str)


def ids_like(values, known_ids):
    """Image ids read as text, typed like the split's ids so they can be looked up.

    With integer split ids, text that is not an integer becomes an id no image has,
    so the lookup reports it as not in the split.
    """
    text = np.array(values, dtype=object).astype(str) if len(values) else np.zeros(0, str)
    if known_ids.dtype.kind != "i":
        return text
    converted = np.full(len(text), np.iinfo(np.int64).min, np.int64)
    ok = np.array([bool(INTEGER.match(v)) and INT64[0] <= int(v) <= INT64[1] for v in text], bool)
    converted[ok] = [int(v) for v in text[ok]]
    return converted
