"""The bounded-memory JSON syntax check of ground-truth files (``json_syntax.check``)
against a whole-document parse by msgspec (a strict RFC 8259 parser, the one the
loaders use): on thousands of damaged files — truncated, a byte inserted, deleted or
replaced by a bracket, comma, colon, quote or backslash, some holding Python's NaN and
-Infinity literals — the verdict (valid,
truncated, or an error) and the message with its line and column are the same. Slices
of 16 bytes make every cut land everywhere: inside strings, escapes, numbers."""

import io
import json
import mmap
import random

import msgspec
import pytest

from evaluation.engine import InputError, load_truth
from evaluation.engine.loaders import json_literals, json_syntax

from . import whole_file

NAN, INF = float("nan"), float("inf")


def _whole(text):
    data = text.encode()
    try:
        json_literals.check_syntax(data)  # msgspec, NaN/Infinity allowed (Python's json)
    except msgspec.DecodeError as e:
        return str(whole_file.decode_error("t.json", e, data))
    return None


def _python_json_accepts(text):
    """Python's json module, which pycocotools reads with (it accepts NaN, Infinity)."""
    try:
        json.loads(text)
    except ValueError:
        return False
    return True


def _bounded(text):
    try:
        json_syntax.check("t.json", io.BytesIO(text.encode()), 0)
    except InputError as e:
        return str(e)
    return None


def _damaged(rng):
    truth = {
        "info": {"note": 'a\\"b', "n": [1, {"x": None}]},
        "images": [{"id": i, "tags": ["x,]", "y\\\\"]} for i in range(rng.randint(0, 5))],
        "annotations": [
            {"id": i, "bbox": [1.5, 2, 3e2, rng.choice([4, NAN, -INF])], "s": 'q"}{NaN'}
            for i in range(rng.randint(0, 8))
        ],
        "categories": [{"id": 1, "name": "c"}],
    }
    text = json.dumps(truth, indent=rng.choice([None, 1]))
    at = rng.randrange(len(text))
    damage = rng.choice(["none", "truncate", "insert", "delete", "replace"])
    if damage == "truncate":
        return text[:at]
    if damage == "insert":
        return text[:at] + rng.choice('{}[],:"\\x 1') + text[at:]
    if damage == "delete":
        return text[:at] + text[at + 1 :]
    if damage == "replace":
        return text[:at] + rng.choice('{}[],:"') + text[at + 1 :]
    return text


@pytest.mark.parametrize("seed", range(6))
def test_bounded_check_agrees_with_a_whole_document_parse(monkeypatch, seed):
    monkeypatch.setattr(json_syntax, "CHUNK_BYTES", 16)
    rng = random.Random(seed)
    verdicts = set()
    for _ in range(400):
        text = _damaged(rng)
        if not text.strip():
            continue
        expected = _whole(text)
        assert _bounded(text) == expected, text
        assert (expected is None) == _python_json_accepts(text), text
        verdicts.add("valid" if expected is None else expected.split(":")[1])
    assert {"valid", " the JSON ends early", " not valid JSON"} <= verdicts


def test_a_malformed_truth_file_is_rejected_without_mapping_it(files, monkeypatch):
    """A truncated split, or one with a syntax error deep inside, is rejected by the
    bounded check alone (no file is ever memory-mapped), naming the error's line and
    column."""
    monkeypatch.setattr(json_syntax, "CHUNK_BYTES", 1024)
    monkeypatch.setattr(mmap, "mmap", lambda *a, **k: pytest.fail("the file was mapped"))
    anns = [{"id": i, "image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4]} for i in range(3000)]
    text = json.dumps(
        {"images": [{"id": 1}], "categories": [{"id": 1, "name": "c"}], "annotations": anns},
        indent=1,
    )
    path = files.write("split.json", text[:-50])
    with pytest.raises(InputError, match=r"split\.json: the JSON ends early: .*truncated"):
        load_truth(path)
    lines = text.split("\n")
    at = next(i for i in range(2000, len(lines)) if '"id":' in lines[i])
    lines[at] = lines[at].replace(":", "", 1)  # a missing colon, deep in the file
    path = files.write("split.json", "\n".join(lines)[:-50])
    column = lines[at].index('"id"') + 6  # just after the key, where ':' should be
    with pytest.raises(
        InputError,
        match=rf"split\.json: not valid JSON: expected ':' at line {at + 1}, column {column}$",
    ):
        load_truth(path)
    path = files.write("split.json", json.dumps(anns)[:-10])
    with pytest.raises(InputError, match=r"got a JSON array \(is this a predictions file\?\)"):
        load_truth(path)
