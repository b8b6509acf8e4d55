"""The records export's ``detection`` column is the record's position in the file, also
after the loaders left records out (red team audit13 F2).

Reference: pycocotools 2.0.11. ``COCO.loadRes`` numbers bbox results 1..n in file
order (``ann['id'] = id + 1``) and keeps the results of categories the split does not
list, so a result's id is its file position + 1; ``COCOeval.evalImgs`` gives, per
image and category (area "all", maxDets 100), each result's ``dtIds``, ``dtMatches``
and ``dtIgnore`` and each box's ``gtMatches`` at every IoU threshold (index 0: 0.5,
the coco protocol's primary threshold). ``loadRes`` asserts every result's image is
in the split, so for ``unknown_images="drop"`` the reference is given the file without
those records and its ids are mapped back to the file's positions.
"""

import csv
import dataclasses
import io
import json

import numpy as np
import pytest

from evaluation.engine import export, load_predictions, load_truth, shards
from evaluation.engine.loaders import csv_tables, results_stream
from evaluation.engine.matching import match
from evaluation.engine.pieces import stream_pieces

from .conftest import pycocotools_eval
from .synthetic import make_detections, make_split

UNKNOWN_IMAGE = 10**7


def _case(tmp_path, seed, unknown_images=0.0):
    """A split, and detections of which some are of unlisted classes (and, with
    ``unknown_images``, of images outside the split), written as JSON."""
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=12, n_classes=3, boxes_per_image=4, crowd_rate=0.1)
    dets = make_detections(rng, split, extra_class_rate=0.3)
    for d in dets:
        if rng.random() < unknown_images:
            d["image_id"] = UNKNOWN_IMAGE
    (tmp_path / "truth.json").write_text(json.dumps(split))
    (tmp_path / "dets.json").write_text(json.dumps(dets))
    return split, dets


def _reference(tmp_path, dets):
    """pycocotools' outcomes by file position: ``{position: tp/fp/ignored}`` per
    detection it evaluates, ``{box id: position}`` per matched box."""
    kept = [i for i, d in enumerate(dets) if d["image_id"] != UNKNOWN_IMAGE]
    (tmp_path / "given.json").write_text(json.dumps([dets[i] for i in kept]))
    evaluator = pycocotools_eval(tmp_path / "truth.json", tmp_path / "given.json")
    outcome, matched = {}, {}
    for e in evaluator.evalImgs:
        if not e or e["aRng"] != evaluator.params.areaRng[0]:
            continue
        for d, dt_id in enumerate(e["dtIds"]):
            if e["dtIgnore"][0, d]:
                value = "ignored"
            else:
                value = "tp" if e["dtMatches"][0, d] > 0 else "fp"
            outcome[kept[dt_id - 1]] = value
        for g, gt_id in enumerate(e["gtIds"]):
            if e["gtMatches"][0, g] > 0:
                matched[gt_id] = kept[int(e["gtMatches"][0, g]) - 1]
    return outcome, matched


def _rows(records, truth):
    return list(csv.DictReader(io.StringIO("".join(export.csv_chunks(records, truth)))))


def _check_rows(rows, dets, outcome, matched):
    """Each detection row names its own record and has pycocotools' outcome; each box
    row pycocotools matched names the record that matched it."""
    detections = [r for r in rows if r["row"] == "detection"]
    assert detections and len(detections) == len(outcome)
    for row in detections:
        d = dets[int(row["detection"])]
        assert row["score"] == repr(float(d["score"]))  # the record the row names
        assert [float(row[k]) for k in "xywh"] == pytest.approx(d["bbox"], abs=0)
        assert row["image_id"] == str(d["image_id"])
        assert row["class"] == f"class{d['category_id']}"
        assert row["outcome"] == outcome[int(row["detection"])]
    for row in rows:
        if row["row"] == "box" and row["outcome"] == "matched":
            assert int(row["detection"]) == matched[int(row["box_id"])]


@pytest.mark.parametrize("seed", range(4))
def test_whole_file_rows_name_file_records(tmp_path, seed):
    """Unlisted classes dropped (the default): rows name file records, with
    pycocotools' outcome for the result of id position + 1."""
    split, dets = _case(tmp_path, seed)
    dropped = [i for i, d in enumerate(dets) if d["category_id"] > 3]
    assert dropped and dropped[0] < len(dets) - 1  # a record moves
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "dets.json", truth)
    assert predictions.dropped == len(dropped)
    expected = np.setdiff1d(np.arange(len(dets)), dropped)
    assert predictions.record.tolist() == expected.tolist()
    records = match(truth, predictions, "coco")
    _check_rows(_rows(records, truth), dets, *_reference(tmp_path, dets))


@pytest.mark.parametrize("seed", range(3))
def test_unknown_images_dropped_keep_their_numbers(tmp_path, seed):
    """``unknown_images="drop"`` and unlisted classes together."""
    split, dets = _case(tmp_path, 10 + seed, unknown_images=0.2)
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "dets.json", truth, unknown_images="drop")
    assert predictions.dropped_images > 0
    records = match(truth, predictions, "coco")
    _check_rows(_rows(records, truth), dets, *_reference(tmp_path, dets))


def test_csv_rows_are_data_rows(tmp_path):
    """A CSV file's position is its data row (header and blank lines not counted)."""
    split, dets = _case(tmp_path, 21)
    path = tmp_path / "dets.csv"
    with open(path, "w", newline="") as f:
        out = csv.writer(f)
        out.writerow(["image_id", "label", "x_min", "y_min", "x_max", "y_max", "score"])
        for k, d in enumerate(dets):
            if k % 5 == 0:
                f.write("\n")  # blank lines are no records
            x, y, w, h = d["bbox"]
            out.writerow(
                [d["image_id"], f"class{d['category_id']}", x, y, x + w, y + h, d["score"]]
            )
    truth = load_truth(tmp_path / "truth.json")
    records = match(truth, load_predictions(path, truth), "coco")
    rows = _rows(records, truth)
    outcome, matched = _reference(tmp_path, dets)
    for row in rows:  # CSV corners give back w, h within rounding
        if row["row"] == "detection":
            d = dets[int(row["detection"])]
            assert row["score"] == repr(float(d["score"]))
            assert float(row["x"]) == d["bbox"][0] and float(row["y"]) == d["bbox"][1]
            assert row["outcome"] == outcome[int(row["detection"])]
        elif row["outcome"] == "matched":
            assert int(row["detection"]) == matched[int(row["box_id"])]


@pytest.mark.parametrize("fmt", ["json", "csv"])
def test_streamed_shards_give_the_whole_files_rows(tmp_path, monkeypatch, fmt):
    """The platform's path — the file streamed into pieces in tiny blocks, each shard
    matched, shards merged (``pieces.stream_pieces``, ``shards.match_shard``,
    ``shards.merge``) — exports the rows of the whole-file path, row for row."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 1024)
    monkeypatch.setattr(csv_tables, "BLOCK_ROWS", 7)
    split, dets = _case(tmp_path, 31, unknown_images=0.1)
    path = tmp_path / "dets.json"
    if fmt == "csv":
        path = tmp_path / "dets.csv"
        with open(path, "w", newline="") as f:
            out = csv.writer(f)
            out.writerow(["image_id", "label", "x_min", "y_min", "x_max", "y_max", "score"])
            for d in dets:
                x, y, w, h = d["bbox"]
                out.writerow(
                    [d["image_id"], f"class{d['category_id']}", x, y, x + w, y + h, d["score"]]
                )
    truth = load_truth(tmp_path / "truth.json")
    options = {"unknown_images": "drop"}
    whole = match(truth, load_predictions(path, truth, **options), "coco")
    ranges = shards.plan(truth.n_images, 5)
    streamed = stream_pieces(path, truth, ranges, tmp_path, **options)
    assert streamed.counts.record_positions
    parts = []
    for piece in streamed.paths:
        sliced_truth, box_index, sliced, positions = shards.load_piece(piece)
        parts.append(
            (shards.match_shard(sliced_truth, box_index, sliced, positions, "coco"), box_index)
        )
    merged = shards.merge(parts, truth.n_boxes)
    assert merged.det_record is not None
    assert _rows(merged, truth) == _rows(whole, truth)
    outcome, matched = _reference(tmp_path, dets)
    for row in _rows(merged, truth):
        if row["row"] == "detection":
            assert row["score"] == repr(float(dets[int(row["detection"])]["score"]))
            assert row["outcome"] == outcome[int(row["detection"])]


def test_records_file_keeps_positions_and_old_files_load_without(tmp_path):
    """``--records``: ``det_record`` is saved and loaded; a records file without it (as
    engines before 2.24.0 wrote) loads with None, and the export falls back to
    ``det_order``."""
    from evaluation.engine.records import MatchRecords

    split, dets = _case(tmp_path, 41)
    truth = load_truth(tmp_path / "truth.json")
    records = match(truth, load_predictions(tmp_path / "dets.json", truth), "coco")
    records.save(tmp_path / "r.npz")
    again = MatchRecords.load(tmp_path / "r.npz")
    assert np.array_equal(again.det_record, records.det_record)
    assert _rows(again, truth) == _rows(records, truth)
    old = dataclasses.replace(records, det_record=None)
    old.save(tmp_path / "old.npz")
    loaded = MatchRecords.load(tmp_path / "old.npz")
    assert loaded.det_record is None
    assert [r["detection"] for r in _rows(loaded, truth) if r["row"] == "detection"] == [
        str(v) for v in records.det_order.tolist()
    ]


def test_nothing_left_out_keeps_no_column(tmp_path):
    """A file whose every record is loaded: no ``record`` column (positions are the
    indices), nothing stored beside the records."""
    split, dets = _case(tmp_path, 51)
    dets = [d for d in dets if d["category_id"] <= 3]
    (tmp_path / "dets.json").write_text(json.dumps(dets))
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "dets.json", truth)
    assert predictions.record is None
    records = match(truth, predictions, "coco")
    assert records.det_record is None
    _check_rows(_rows(records, truth), dets, *_reference(tmp_path, dets))


def _by_score(rows, dets):
    """Each detection row's record (its ``detection``) holds the row's score and box."""
    for row in rows:
        if row["row"] == "detection":
            d = dets[int(row["detection"])]
            assert row["score"] == repr(float(d["score"]))
            assert [float(row[k]) for k in "xywh"] == [float(v) for v in d["bbox"]]


def test_uncompared_unfit_records_keep_their_numbers(tmp_path):
    """A record pycocotools never compares (ranked past the 100 of its image and
    category) with a box it cannot read is left out (``uncompared.COUNT``), as is a
    record of an unlisted class: later records keep their numbers; outcomes are
    pycocotools' for the result of id position + 1."""
    from .test_uncompared import _SPLIT, _bad, _flood

    flood = _flood("box")
    bad = _bad("box", {"bbox": [2, 3, 10, 8, 5]}, 0.0001)  # 5 numbers: unreadable
    other = {"image_id": 2, "category_id": 9, "score": 0.9, "bbox": [5, 5, 8, 8]}
    hit = {"image_id": 2, "category_id": 2, "score": 0.8, "bbox": [5, 5, 8, 8]}
    dets = [bad, other, *flood[:50], hit, *flood[50:]]
    (tmp_path / "truth.json").write_text(json.dumps(_SPLIT))
    (tmp_path / "dets.json").write_text(json.dumps(dets))
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "dets.json", truth)
    assert predictions.box_counts["uncompared_unfit"] == 1 and predictions.dropped == 1
    assert predictions.record.tolist() == list(range(2, len(dets)))
    rows = _rows(match(truth, predictions, "coco"), truth)
    _by_score(rows, dets)
    outcome, matched = _reference(tmp_path, dets)
    assert {int(r["detection"]): r["outcome"] for r in rows if r["row"] == "detection"} == outcome
    assert {
        int(r["box_id"]): int(r["detection"])
        for r in rows
        if r["row"] == "box" and r["outcome"] == "matched"
    } == matched


def test_as_given_rows_name_the_record_they_carry(tmp_path):
    """Read "as given", a repeated id puts its last result in the place of each
    (``as_given``): rows are laid out by image, and each names the record whose values
    it carries, so two rows name one record; the unlisted first record keeps its
    number."""
    from .test_as_given import _SPLIT, HEAD, det

    dets = [HEAD, det(5, 2, 1, 0.9), det(6, 1, 1, 0.8, (50, 50, 20, 20)), det(5, 1, 1, 0.7)]
    (tmp_path / "truth.json").write_text(json.dumps(_SPLIT))
    (tmp_path / "dets.json").write_text(json.dumps(dets))
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "dets.json", truth)
    assert predictions.box_counts["replaced_by_id"] == 1
    assert sorted(predictions.record.tolist()) == [2, 3, 3]
    rows = _rows(match(truth, predictions, "coco"), truth)
    _by_score(rows, dets)
    assert sorted(int(r["detection"]) for r in rows if r["row"] == "detection") == [2, 3, 3]


def test_label_folder_positions_follow_the_reading_order(tmp_path):
    """A YOLO folder: records numbered in the order the loader reads them (files in
    name order, lines in file order); records of an image outside the split, dropped
    while reading (``unknown_images="drop"``), and of an unlisted class keep their
    numbers."""
    from . import label_writers

    images = {1: (100, 100), 2: (100, 100), 10: (100, 100)}
    split = {
        "images": [{"id": 1, "width": 100, "height": 100}, {"id": 2, "width": 100, "height": 100}],
        "categories": [{"id": 1, "name": "car"}, {"id": 2, "name": "van"}],
        "annotations": [
            {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 20, 20], "area": 400},
            {"id": 2, "image_id": 2, "category_id": 2, "bbox": [40, 40, 20, 20], "area": 400},
        ],
    }
    for a in split["annotations"]:
        a["iscrowd"] = 0
    (tmp_path / "truth.json").write_text(json.dumps(split))
    detections = [
        (10, "car", (10, 10, 20, 20), 0.9),  # image 10 is not in the split
        (1, "truck", (10, 10, 20, 20), 0.8),  # truck is not one of the split's classes
        (1, "car", (12, 10, 20, 20), 0.7),
        (1, "car", (60, 60, 20, 20), 0.6),
        (2, "van", (40, 40, 20, 20), 0.5),
    ]
    folder = label_writers.yolo(
        tmp_path / "yolo", images, ["car", "van", "truck"], [], detections=detections
    )
    # the loader's order: 1.txt, 10.txt, 2.txt (name order), lines as written
    read = [d for name in ("1", "10", "2") for d in detections if str(d[0]) == name]
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(folder, truth, unknown_images="drop")
    assert predictions.dropped_images == 1 and predictions.dropped == 1
    rows = _rows(match(truth, predictions, "coco"), truth)
    named = {int(r["detection"]): r for r in rows if r["row"] == "detection"}
    assert sorted(named) == [1, 2, 4]  # 0: truck, 3: image 10
    for position, row in named.items():
        image, name, box, score = read[position]
        assert (row["image_id"], row["class"], float(row["score"])) == (str(image), name, score)
        assert [float(row[k]) for k in "xywh"] == pytest.approx(box)
    assert {r["outcome"] for p, r in named.items() if read[p][3] in (0.7, 0.5)} == {"tp"}


def test_unreadable_records_on_lost_ids_keep_their_numbers(tmp_path):
    """A detection whose score pycocotools would fail on, on an image its ``np.unique``
    loses (never fetched), is left out (``unreadable_on_lost_ids``): the next record
    keeps its number, with pycocotools' outcome for id position + 1."""
    from .test_unique_lost_rules import _two_images

    split, dets = _two_images()
    dets[1]["score"] = "high"
    (tmp_path / "truth.json").write_text(json.dumps(split))
    (tmp_path / "dets.json").write_text(json.dumps(dets))
    truth = load_truth(tmp_path / "truth.json")
    predictions = load_predictions(tmp_path / "dets.json", truth)
    assert predictions.box_counts["unreadable_on_lost_ids"] == 1
    assert predictions.record.tolist() == [0, 2]
    rows = _rows(match(truth, predictions, "coco"), truth)
    outcome, matched = _reference(tmp_path, dets)
    assert outcome == {0: "tp", 2: "fp"}
    assert {int(r["detection"]): r["outcome"] for r in rows if r["row"] == "detection"} == outcome
    _by_score(rows, dets)
