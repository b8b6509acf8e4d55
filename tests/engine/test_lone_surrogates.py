"""Lone UTF-16 surrogate escapes in JSON strings, against pycocotools 2.0.11.

``"\\ud800"`` without its partner is valid JSON (RFC 8259 section 8.2 allows any
escaped code unit) and Python's ``json`` module, which pycocotools 2.0.11 reads both
files with (``COCO.__init__``, ``COCO.loadRes``: ``json.load``), reads it into a ``str``
holding that code point; such ids key its dicts like any other text and sort by code
point (U+D800..U+DFFF between U+D7FF and U+E000; an astral character such as U+1F600,
one code point in Python, above them all). Every number below is compared with
pycocotools run on the same two files; what the engine writes is checked to be UTF-8
text, with each surrogate as its escape.
"""

import json
import os
import re
import subprocess
import sys

import msgspec
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import evaluate, load_predictions, load_truth
from evaluation.engine.errors import InputError
from evaluation.engine.loaders import coco_truth, json_syntax, results_stream

from .synthetic import make_detections, make_split
from .test_any_ids import _tied_pair
from .test_coco_reference import _compare

#: Surrogates of both halves, their neighbours, an astral character and the characters
#: of an escape written as text ("\\ud800" is six characters, another id).
ALPHABET = ["a", "\\", "u", "d", "8", "0", "\ud800", "\udbff", "\udc00", "\udfff"]
ALPHABET += ["\ud7ff", "\ue000", "\U0001f600"]
#: A high surrogate followed by a low one is written as a pair, which reads back as one
#: astral character: not the text drawn, so such draws are left out.
_PAIR = re.compile("[\ud800-\udbff][\udc00-\udfff]")
TEXT = st.text(st.sampled_from(ALPHABET), max_size=5).filter(lambda t: not _PAIR.search(t))


def _unique(draw, n):
    return draw(st.lists(TEXT, min_size=n, max_size=n, unique=True))


def _restyle(draw, split, detections, class_text):
    """Surrogate text in image ids, category ids (or not), category names, file names,
    tags and fields nothing reads."""
    images = [im["id"] for im in split["images"]]
    image_map = dict(zip(images, _unique(draw, len(images))))
    classes = [c["id"] for c in split["categories"]]
    class_map = dict(zip(classes, _unique(draw, len(classes)) if class_text else classes))
    split["info"] = {"description": draw(TEXT)}
    for image in split["images"]:
        image["id"] = image_map[image["id"]]
        image["file_name"] = draw(TEXT) + ".jpg"
        image["tags"] = [draw(TEXT)]
    for category in split["categories"]:
        category["id"] = class_map[category["id"]]
        category["name"] = draw(TEXT)  # may meet another's name, here or once escaped
    for ann in split["annotations"]:
        ann["image_id"] = image_map[ann["image_id"]]
        ann["category_id"] = class_map[ann["category_id"]]
        ann["note"] = draw(TEXT)  # (a text annotation id pycocotools matches it writes
        # into a float array: ``float("\ud800")`` raises; see the worked example)
    for det in detections:
        det["image_id"] = image_map[det["image_id"]]
        det["category_id"] = class_map.get(det["category_id"], det["category_id"])
        det["note"] = draw(TEXT)


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_images=st.integers(1, 12),
    class_text=st.booleans(),
    data=st.data(),
)
def test_lone_surrogates_anywhere_score_like_pycocotools(
    tmp_path, seed, n_images, class_text, data
):
    """All 12 summary numbers and every per-class AP, AP50, AP75 and recall equal
    pycocotools 2.0.11's on the same files (ties across images: the order of the ids)."""
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=n_images, n_classes=3, boxes_per_image=3, crowd_rate=0.1)
    detections = make_detections(
        rng, split, hit_rate=0.8, false_per_image=2.0, score_levels=3, extra_class_rate=0.1
    )
    if not detections:  # the reference cannot load an empty result list
        detections = [{"image_id": split["images"][0]["id"], "category_id": 1,
                       "bbox": [1.0, 1.0, 5.0, 5.0], "score": 0.5}]  # fmt: skip
    _restyle(data.draw, split, detections, class_text)
    ours, _ = _compare(tmp_path, split, detections)
    truth = load_truth(tmp_path / "truth.json")
    for text in (*truth.classes, *truth.image_ids.tolist(), *truth.box_ids.tolist()):
        str(text).encode("utf-8")  # nothing kept for display is unencodable
    assert len(set(truth.classes)) == len(truth.classes)


@pytest.mark.parametrize(
    "ids",
    [
        ("\ud800", "\ud7ff"),  # a surrogate sorts after U+D7FF...
        ("\ue000", "\udfff"),  # ...and before U+E000
        ("\U0001f600", "\ue000"),  # an astral character: one code point, above U+E000
        ("\\ud800", "\ud800"),  # the escape written as text is another id, sorted first
    ],
)
def test_tied_detections_follow_pycocotools_order_of_surrogate_ids(tmp_path, ids):
    """Two images, a true and a false detection tied on each: AP50 follows the
    reference's order of the ids (``test_any_ids._tied_pair``)."""
    ours, reference = _compare(tmp_path, *_tied_pair(ids))
    assert ours["summary"]["AP50"] == pytest.approx(reference.stats[1], abs=1e-12)


def test_the_order_of_surrogate_ids_changes_the_number(tmp_path):
    """The check above has teeth (worked out by hand: the false detection ranks first
    on the image sorted first, so precision at the first true one is 1/2 one way and
    1/1 the other, AP50 0.75 against 1.0 over the two true ones)."""
    first, _ = _compare(tmp_path, *_tied_pair(("\ud800", "\ue000")))
    second, _ = _compare(tmp_path, *_tied_pair(("\ud800", "\ud7ff")))
    assert first["summary"]["AP50"] != second["summary"]["AP50"]


def _write(tmp_path, split, detections):
    gt, dt = tmp_path / "gt.json", tmp_path / "dt.json"
    gt.write_text(json.dumps(split))
    dt.write_text(json.dumps(detections))
    return gt, dt


def _example():
    """A worked example: two images, text ids "a\\ud800" and "a\\\\ud800" (a backslash
    written as text), two categories named alike once the surrogate is escaped; the
    annotation of text id "\\ud800" is never matched (pycocotools writes a matched id
    into a float array, and ``float("\\ud800")`` raises)."""
    ids = ["a\ud800", "a\\ud800"]
    split = {
        "info": {"description": "\udfff"},
        "images": [{"id": i, "file_name": f"{i}.jpg", "tags": ["\udc00"]} for i in ids],
        "categories": [{"id": "c\ud800", "name": "car\ud800"}, {"id": "c", "name": "car\\ud800"}],
        "annotations": [
            {
                "id": 1,
                "image_id": ids[0],
                "category_id": "c\ud800",
                "bbox": [0, 0, 10, 10],
                "area": 100,
                "iscrowd": 0,
            },
            {
                "id": "\ud800",
                "image_id": ids[1],
                "category_id": "c",
                "bbox": [0, 0, 10, 10],
                "area": 100,
                "iscrowd": 0,
            },
        ],  # fmt: skip
    }
    detections = [
        {"image_id": ids[0], "category_id": "c\ud800", "bbox": [0, 0, 10, 10], "score": 0.9},
        {"image_id": ids[1], "category_id": "c", "bbox": [50, 50, 10, 10], "score": 0.8},
        {"image_id": ids[1], "category_id": "c\udc00", "bbox": [0, 0, 10, 10], "score": 0.7},
    ]
    return split, detections


def test_worked_example_kept_apart_and_shown_escaped(tmp_path):
    """By hand: class "c\\ud800" is found (AP 1), class "c" is missed (AP 0), the
    detection of "c\\udc00" (no such category) is dropped; the two ids are two images and
    the two names, alike once escaped, are told apart by id (common practice here:
    ``annotation_index.rename_shared_names``). pycocotools agrees on every number."""
    split, detections = _example()
    ours, _ = _compare(tmp_path, split, detections)
    truth = load_truth(tmp_path / "truth.json")
    assert truth.image_id_type == "json" and truth.class_id_type == "json"
    assert truth.image_ids.tolist() == ['"a\\\\ud800"', '"a\\ud800"']  # sorted: "\\" < U+D800
    assert truth.class_ids.tolist() == ['"c"', '"c\\ud800"']
    assert truth.classes == ('car\\ud800 (id "c")', 'car\\ud800 (id "c\\ud800")')
    assert truth.image_tags == (("\\udc00",), ("\\udc00",))
    assert sorted(truth.box_ids.tolist()) == ["1", "\\ud800"]
    assert ours["per_class"]['car\\ud800 (id "c\\ud800")']["AP"] == pytest.approx(1.0)
    assert ours["per_class"]['car\\ud800 (id "c")']["AP"] == pytest.approx(0.0)
    predictions = load_predictions(tmp_path / "predictions.json", truth)
    assert predictions.dropped_classes == ("c\\udc00",)  # shown escaped, as names are


def test_names_and_ids_alike_once_escaped_are_told_apart(tmp_path):
    """Category ids "\\ud800" and "\\\\ud800" (escaped, both read ``\\ud800``) sharing a
    name: the renamed names carry the ids as the split shows them, JSON-quoted, so they
    differ; each class scores as pycocotools scores its category."""
    split, detections = _tied_pair(("a", "b"))
    split["categories"] = [{"id": "\ud800", "name": "car"}, {"id": "\\ud800", "name": "car"}]
    for record, category in zip(split["annotations"], ["\ud800", "\\ud800"]):
        record["category_id"] = category
    for record, category in zip(detections, ["\ud800", "\\ud800", "\ud800"]):
        record["category_id"] = category
    ours, _ = _compare(tmp_path, split, detections)
    assert list(ours["per_class"]) == ['car (id "\\\\ud800")', 'car (id "\\ud800")']


def test_strict_annotations_refuse_names_alike_once_escaped(tmp_path):
    """``annotations="strict"`` refuses categories sharing a name: so it does for two
    names that meet once the surrogate is shown as its escape, naming the record."""
    gt, _ = _write(tmp_path, *_example())
    with pytest.raises(InputError, match=r"categories\[1\].*name") as caught:
        load_truth(gt, annotations="strict")
    str(caught.value).encode("utf-8")
    split, _ = _example()
    split["categories"][1]["name"] = "bus"
    gt, _ = _write(tmp_path, split, [])
    assert load_truth(gt, annotations="strict").classes == ("bus", "car\\ud800")


def test_an_unknown_surrogate_image_is_named_escaped(tmp_path):
    """A detection of an image the split lacks is refused (pycocotools' ``loadRes``
    asserts), the id shown as Python's ``repr`` shows it: escaped, printable."""
    split, detections = _example()
    detections[0]["image_id"] = "b\ud800"
    gt, dt = _write(tmp_path, split, detections)
    with pytest.raises(InputError) as caught:
        load_predictions(dt, load_truth(gt))
    assert "'b\\ud800'" in str(caught.value)
    str(caught.value).encode("utf-8")


def test_an_encoded_surrogate_is_not_utf8_and_stays_refused(tmp_path):
    """Bytes ED A0 80 (U+D800 encoded as if it were a character) are invalid UTF-8:
    pycocotools' text-mode ``open`` raises on them (UnicodeDecodeError), and so does
    the engine, with a clear message (only the escape is valid JSON text)."""
    from .conftest import pycocotools_eval

    split, detections = _example()
    gt, dt = _write(tmp_path, split, detections)
    data = gt.read_bytes().replace(b'"car\\\\ud800"', b'"car\xed\xa0\x80"')
    assert b"\xed" in data
    gt.write_bytes(data)
    with pytest.raises(UnicodeDecodeError):
        pycocotools_eval(gt, dt)
    with pytest.raises(InputError, match=r"not UTF-8 text: byte 0xed at line 1, column \d+ "):
        load_truth(gt)


def test_cached_reads_equal_fresh_ones(tmp_path):
    """The .npz cache holds the escaped text: a cache hit gives what the file gave."""
    gt, dt = _write(tmp_path, *_example())
    cache = tmp_path / "cache"
    first = load_truth(gt, cache_dir=cache)
    again = load_truth(gt, cache_dir=cache)
    assert again.image_ids.tolist() == first.image_ids.tolist()
    assert again.classes == first.classes and again.image_tags == first.image_tags
    fresh = evaluate(first, load_predictions(dt, first, cache_dir=cache))
    hit = evaluate(again, load_predictions(dt, again, cache_dir=cache))
    assert json.dumps(hit) == json.dumps(fresh)


@pytest.mark.parametrize("chunk", [16, 64, 1 << 20])
def test_sliced_ground_truth_equals_the_whole_file(tmp_path, monkeypatch, chunk):
    """Ground truth read in slices (``json_syntax``) of any size, surrogates in the
    outer object and in records cut anywhere: the same split as one slice gives."""
    split, detections = _example()
    split["\ud800"] = ["\udc00", {"x": "\ud800"}]  # a key nothing reads
    gt, dt = _write(tmp_path, split, detections)
    whole = load_truth(gt)
    monkeypatch.setattr(json_syntax, "CHUNK_BYTES", chunk)
    monkeypatch.setattr(coco_truth, "SYNTAX_FIRST_BYTES", 0)
    sliced = load_truth(gt)
    for name in ("image_ids", "class_ids", "box_ids", "boxes", "box_image", "box_class"):
        np.testing.assert_array_equal(getattr(sliced, name), getattr(whole, name))
    assert (sliced.classes, sliced.image_tags) == (whole.classes, whole.image_tags)


@pytest.mark.parametrize("images_per_shard", [1, 3, 12])
def test_streamed_pieces_equal_the_whole_files_pieces(tmp_path, monkeypatch, images_per_shard):
    """Detections read in tiny blocks and streamed into shards equal, bit for bit, the
    pieces cut from the whole-file load (``test_stream_pieces`` patterns)."""
    from .test_stream_pieces import _compare as compare_pieces

    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 256)
    rng = np.random.default_rng(3)
    split = make_split(rng, n_images=12, n_classes=3, boxes_per_image=3, crowd_rate=0.1)
    detections = make_detections(rng, split, score_levels=5, duplicate_rate=0.4)
    draw = iter(["\ud800", "\udfff", "a\\ud800", "\ud7ff", "\ue000"] * 100)
    rename = {im["id"]: f"{next(draw)}{im['id']}" for im in split["images"]}
    for image in split["images"]:
        image["id"] = rename[image["id"]]
    for record in split["annotations"] + detections:
        record["image_id"] = rename[record["image_id"]]
        record["note"] = "\udc00"
    gt, dt = _write(tmp_path, split, detections)
    truth = load_truth(gt)
    assert truth.image_id_type == "json"
    predictions, _ = compare_pieces(dt, truth, images_per_shard, tmp_path)
    assert len(predictions.score) + predictions.dropped == len(detections)


def _cli(*args):
    return subprocess.run(
        [sys.executable, "-m", "evaluation.engine", "score", *args],
        capture_output=True,
        env={**os.environ, "PYTHONIOENCODING": "utf-8"},
    )


def _strict(text):
    def refuse(literal):
        raise ValueError(literal)

    return json.loads(text, parse_constant=refuse)


def test_cli_output_is_utf8_text_and_strict_json(tmp_path):
    """Table, JSON report, CSV and JSON Lines records: UTF-8 text (strict decoding);
    the JSON report and each JSON Lines row parse as strict JSON (no NaN literals); a
    JSON Lines image id is the id's own JSON value, except one holding a lone surrogate,
    which strict readers refuse as an escape: that one is the JSON-quoted text the pages
    show."""
    gt, dt = _write(tmp_path, *_example())
    common = ["--truth", str(gt), "--predictions", str(dt)]
    table = _cli(*common)
    assert (table.returncode, table.stderr) == (0, b"")
    assert 'car\\ud800 (id "c\\ud800")' in table.stdout.decode("utf-8")
    report = _cli(*common, "--format", "json")
    assert (report.returncode, report.stderr) == (0, b"")
    parsed = _strict(report.stdout.decode("utf-8"))
    assert msgspec.json.decode(report.stdout) == parsed  # a strict reader takes it too
    assert parsed["per_class"]['car\\ud800 (id "c\\ud800")']["AP"] == pytest.approx(1.0)
    for suffix in ("csv", "jsonl"):
        out = tmp_path / f"records.{suffix}"
        done = _cli(*common, "--records-out", str(out))
        assert (done.returncode, done.stderr) == (0, b"")
        text = out.read_bytes().decode("utf-8")
        if suffix == "jsonl":
            rows = [msgspec.json.decode(line) for line in text.splitlines()]  # strict
            assert rows == [_strict(line) for line in text.splitlines()]
            # the surrogate id quoted as the pages show it (json.loads gives it back);
            # "a\\ud800", a backslash written as text, is written as its value
            assert {r["image_id"] for r in rows} == {'"a\\ud800"', "a\\ud800"}
            assert json.loads('"a\\ud800"') == "a\ud800"
        else:
            assert '"""a\\ud800"""' in text  # the JSON-quoted id, as GroundTruth keeps it


def test_json_lines_ids_stay_apart_and_strict():
    """A split holding the id "a\\ud800" (lone surrogate) and the text id written as
    its quoted form: each JSON Lines id is strict UTF-8 JSON (msgspec decodes it) and
    no two ids are written alike; a written id beginning with a quote gives the id back
    through ``json.loads`` (common practice: RFC 8259 section 8.2 on unpaired
    surrogates)."""
    from evaluation.engine.export import _jsonl_id

    family = ["a\ud800", '"a\\ud800"', "a\\ud800", "plain", '"', 'x"']
    written = [_jsonl_id(i, "json") for i in family]
    assert len(set(written)) == len(family)
    for original, out in zip(family, written):
        msgspec.json.decode(json.dumps(out, ensure_ascii=False).encode("utf-8"))
        assert (json.loads(out) if out.startswith('"') else out) == original
    assert written[3:] == ["plain", '"\\""', 'x"']
    assert _jsonl_id('"a"', "text") == '"a"'  # no surrogate can occur: ids as given
