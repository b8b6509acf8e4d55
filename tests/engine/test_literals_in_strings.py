"""Strings holding the text of a literal (``"NaN}, retried"``, ``"Infinity},"``) read
whatever the slice size. A slice of a results file is cut after a ``}`` and a comma,
which may lie inside such a string; the slice then ends inside the string and must be
read on ("cut short, read more"), and the literal masking of ``json_literals`` must
never touch text inside a string (it did: the valid file was refused as "not valid
JSON"). References: Python's ``json`` module (``json.loads`` reads these files;
a literal inside a string is text, RFC 8259 section 7) and pycocotools 2.0.11
(``loadRes``, ``COCOeval`` with ``iouType='bbox'``), run on the same files."""

import json
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import load_predictions, load_truth
from evaluation.engine.loaders import json_literals, results_stream

from .load_paths import as_pycocotools, every_slice_size, same_columns

_TRUTH = {
    "images": [{"id": 1, "width": 100, "height": 100}, {"id": 2, "width": 100, "height": 100}],
    "annotations": [
        {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 30, 30], "area": 900.0,
         "iscrowd": 0},
        {"id": 2, "image_id": 2, "category_id": 2, "bbox": [50, 40, 20, 30], "area": 600.0,
         "iscrowd": 0},
        {"id": 3, "image_id": 2, "category_id": 1, "bbox": [5, 5, 40, 40], "area": 1600.0,
         "iscrowd": 0},
    ],
    "categories": [{"id": 1, "name": "car"}, {"id": 2, "name": "van"}],
}  # fmt: skip

_TAGS = ["NaN}, retried", "Infinity},", "-Infinity} ,x", "NaN},NaN},", 'q\\"NaN},', "}, NaN"]


def _write(tmp_path, records):
    gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
    gt.write_text(json.dumps(_TRUTH))
    text = json.dumps(records)
    dt.write_text(text)
    return gt, dt


_COLUMNS = ("image", "cls", "boxes", "score")  # box readings: no area column


def _records(rng, n, tags, literal_key=True):
    out = []
    for i in range(n):
        x, y = (float(v) for v in rng.integers(0, 60, 2))
        record = {
            "tag": tags[i % len(tags)],
            "image_id": int(rng.integers(1, 3)),
            "category_id": int(rng.integers(1, 3)),
            "bbox": [x, y, 30.0, 30.0],
            "score": round(float(rng.random()), 3),
        }
        if literal_key:
            record["extra"] = "LITERAL"
        out.append(record)
    return out


def test_the_audits_file_is_scored_as_pycocotools_scores_it(tmp_path, monkeypatch):
    """audit4 F1: one record whose unread ``note`` is ``"NaN},"``: pycocotools 2.0.11
    scores it (Python's json reads it); it was refused at line 1, column 74. Every
    slice size, and the literal masking on the slice that ends inside the string."""
    gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
    gt.write_text(json.dumps(_TRUTH))
    dt.write_bytes(
        b'[{"image_id":1,"category_id":1,"bbox":[11,11,30,30],"score":0.9,"note":"NaN},"}]'
    )
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    as_pycocotools(gt, dt, truth, whole)
    every_slice_size(monkeypatch, dt, truth, whole, _COLUMNS)
    # the masking leaves a string the data ends inside as it is (json_literals)
    cut = b'[{"a":NaN,"note":"NaN}'
    assert json_literals.masked(cut) == b'[{"a":"N","note":"NaN}'


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
def test_every_slice_size_over_strings_holding_literals(tmp_path, monkeypatch, literal):
    """A file full of strings holding ``NaN}, `` and ``Infinity},`` text, real literals
    in an unread key beside them (so every slice takes the literal path), the first
    record longer than the small slices (``_first_mode``, ``_check_prefix``): every
    slice size from 1 byte to the file's length reads as the whole file (Python's json
    reads the file; pycocotools 2.0.11 scores it the same)."""
    rng = np.random.default_rng(3)
    records = _records(rng, 8, _TAGS)
    records[0]["tag"] = "NaN}, " * 12  # the first record: longer than a small slice
    gt, dt = _write(tmp_path, records)
    dt.write_text(dt.read_text().replace('"LITERAL"', literal))
    assert len(json.loads(dt.read_text())) == len(records)  # Python's json reads it
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    as_pycocotools(gt, dt, truth, whole)
    every_slice_size(monkeypatch, dt, truth, whole, _COLUMNS)
    cached = load_predictions(dt, truth, cache_dir=tmp_path / "cache")
    again = load_predictions(dt, truth, cache_dir=tmp_path / "cache")
    same_columns(cached, whole, _COLUMNS)
    same_columns(again, whole, _COLUMNS)


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    seed=st.integers(0, 2**32 - 1),
    tags=st.lists(
        st.lists(
            st.sampled_from(["NaN", "Infinity", "-Infinity", "}", ",", " ", "{", "]", "\\", "x"]),
            max_size=8,
        ).map("".join),
        min_size=1,
        max_size=4,
    ),
    chunk=st.integers(1, 300),
    literal=st.sampled_from(["NaN", "Infinity", "-Infinity", "1.5"]),
)
def test_any_slice_size_over_literal_text_in_strings(
    tmp_path, monkeypatch, seed, tags, chunk, literal
):
    """Random strings built of literal text, braces, commas and backslashes (escaped by
    ``json.dumps``): any slice size reads as the whole file, and the whole file scores as
    pycocotools 2.0.11 scores it."""
    with tempfile.TemporaryDirectory(dir=tmp_path) as d:
        d = Path(d)
        rng = np.random.default_rng(seed)
        gt, dt = _write(d, _records(rng, 6, tags))
        dt.write_text(dt.read_text().replace('"LITERAL"', literal))
        truth = load_truth(gt)
        whole = load_predictions(dt, truth)
        as_pycocotools(gt, dt, truth, whole)
        with monkeypatch.context() as m:
            m.setattr(results_stream, "CHUNK_BYTES", chunk)
            same_columns(load_predictions(dt, truth), whole, _COLUMNS)
