"""Per-detection and per-box reasons on hand-built cases, one per reason.

Definitions: TIDE (Bolya et al., "TIDE: A General Toolbox for Identifying Object Detection
Errors", ECCV 2020, section 2.2), foreground threshold t = the protocol's primary IoU
(0.5 under ``coco``), background threshold 0.1; precedence as its published code tests
them (``tidecv`` 1.0.1, ``TIDERun._eval_image``): localisation, class, duplicate, both,
background. IoU = intersection / union of [x, y, w, h] boxes (common practice).
"""

import numpy as np
import pytest

from evaluation.engine import MatchRecords, match
from evaluation.engine.protocols import PRESETS
from evaluation.engine.reasons import BOX_REASONS, DETECTION_REASONS, attach
from evaluation.engine.records import MissingReasons
from evaluation.engine.version import ENGINE_VERSION

PERSON, CAR = 1, 2


def _case(files, boxes, detections, protocol="coco"):
    """boxes: (class, [x, y, w, h], iscrowd); detections: (class, box, score)."""
    truth = {
        "images": [{"id": 1, "width": 100, "height": 100}, {"id": 2, "width": 100, "height": 100}],
        "categories": [{"id": PERSON, "name": "person"}, {"id": CAR, "name": "car"}],
        "annotations": [
            {
                "id": 10 + i,
                "image_id": 1,
                "category_id": c,
                "bbox": b,
                "iscrowd": crowd,
                "area": b[2] * b[3],
            }
            for i, (c, b, crowd) in enumerate(boxes)
        ],
    }
    predictions = [
        {"image_id": 1, "category_id": c, "bbox": b, "score": s} for c, b, s in detections
    ]
    t, p = files.load(truth, predictions)
    records = match(t, p, protocol)
    by_file = np.argsort(records.det_order)  # records are in accumulation order
    det = [
        (
            DETECTION_REASONS[records.det_reason[i]],
            int(records.det_ref_box[i]),
            float(records.det_ref_iou[i]),
        )
        for i in by_file
    ]
    box = [
        (BOX_REASONS[r], int(records.det_order[d]) if d >= 0 else -1, float(iou))
        for r, d, iou in zip(records.gt_reason, records.gt_ref_det, records.gt_ref_iou)
    ]
    return det, box, records


def test_tp(files):
    # Identical boxes: IoU = 100 / 100 = 1 >= 0.5, matched.
    det, box, _ = _case(files, [(PERSON, [0, 0, 10, 10], 0)], [(PERSON, [0, 0, 10, 10], 0.9)])
    assert det == [("tp", 0, 1.0)]
    assert box == [("matched", 0, 1.0)]


def test_fp_duplicate(files):
    # d0 takes the box (IoU 1). d1 [0,0,10,8]: 80 / 100 = 0.8 >= 0.5 with the same box,
    # already taken by the higher-scored d0 -> duplicate.
    det, box, _ = _case(
        files,
        [(PERSON, [0, 0, 10, 10], 0)],
        [(PERSON, [0, 0, 10, 10], 0.9), (PERSON, [0, 0, 10, 8], 0.8)],
    )
    assert det == [("tp", 0, 1.0), ("fp_duplicate", 0, pytest.approx(0.8))]
    assert box == [("matched", 0, 1.0)]


def test_fp_localisation(files):
    # [5,0,10,10] vs [0,0,10,10]: intersection 5 x 10 = 50, union 100 + 100 - 50 = 150,
    # IoU 1/3 in [0.1, 0.5) -> localisation; the box is missed but this error points at
    # it (TIDE: not a missed-GT error).
    det, box, _ = _case(files, [(PERSON, [0, 0, 10, 10], 0)], [(PERSON, [5, 0, 10, 10], 0.9)])
    assert det == [("fp_localisation", 0, pytest.approx(1 / 3))]
    assert box == [("missed_localisation", 0, pytest.approx(1 / 3))]


def test_fp_class(files):
    # A person detection on a car: [0,0,10,9] vs [0,0,10,10]: 90 / 100 = 0.9 >= 0.5
    # with a box of another class -> class error.
    det, box, _ = _case(files, [(CAR, [0, 0, 10, 10], 0)], [(PERSON, [0, 0, 10, 9], 0.9)])
    assert det == [("fp_class", 0, pytest.approx(0.9))]
    assert box == [("missed_class", 0, pytest.approx(0.9))]


def test_fp_localisation_and_class(files):
    # [6,0,10,10] vs the car [0,0,10,10]: 4 x 10 = 40 / (200 - 40) = 0.25 in [0.1, 0.5),
    # another class, no person box -> both. TIDE fixes nothing with it, so the car is a
    # plain missed box; the detection is still named as the nearest one.
    det, box, _ = _case(files, [(CAR, [0, 0, 10, 10], 0)], [(PERSON, [6, 0, 10, 10], 0.9)])
    assert det == [("fp_localisation_and_class", 0, 0.25)]
    assert box == [("missed", 0, 0.25)]


def test_fp_background(files):
    # [9.5,0,10,10] vs [0,0,10,10]: 0.5 x 10 = 5 / (200 - 5) = 0.0256 < 0.1 -> background
    # (best box named, IoU > 0); [50,50,10,10] touches nothing -> background, no box.
    det, box, _ = _case(
        files,
        [(PERSON, [0, 0, 10, 10], 0)],
        [(PERSON, [9.5, 0, 10, 10], 0.9), (PERSON, [50, 50, 10, 10], 0.8)],
    )
    assert det[0] == ("fp_background", 0, pytest.approx(5 / 195))
    assert det[1][:2] == ("fp_background", -1) and np.isnan(det[1][2])
    assert box == [("missed", 0, pytest.approx(5 / 195))]


def test_ignored_crowd(files):
    # Inside a crowd region: IoU = intersection / detection area = 100 / 100 = 1
    # (pycocotools bbIou) -> matched to the crowd box, ignored; the crowd box is ignored.
    det, box, _ = _case(files, [(PERSON, [0, 0, 20, 20], 1)], [(PERSON, [0, 0, 10, 10], 0.9)])
    assert det == [("ignored", 0, 1.0)]
    assert box[0][0] == "ignored" and box[0][1] == -1


def test_missed_without_any_detection(files):
    det, box, _ = _case(files, [(PERSON, [0, 0, 10, 10], 0)], [(CAR, [60, 60, 10, 10], 0.9)])
    assert det[0][0] == "fp_background"
    assert box[0][:2] == ("missed", -1) and np.isnan(box[0][2])


def test_localisation_before_class(files):
    # Same-class IoU 1/3 (localisation range) and another class's box at IoU 1: TIDE
    # tests localisation first.
    det, _, _ = _case(
        files,
        [(PERSON, [5, 0, 10, 10], 0), (CAR, [0, 0, 10, 10], 0)],
        [(PERSON, [0, 0, 10, 10], 0.9)],
    )
    assert det == [("fp_localisation", 0, pytest.approx(1 / 3))]


def test_class_before_duplicate(files):
    # d1 overlaps the taken person box by 0.8 (duplicate range) and a car box by 1:
    # TIDE tests class before duplicate.
    det, _, _ = _case(
        files,
        [(PERSON, [0, 0, 10, 10], 0), (CAR, [0, 0, 10, 8], 0)],
        [(PERSON, [0, 0, 10, 10], 0.9), (PERSON, [0, 0, 10, 8], 0.8)],
    )
    assert det[1] == ("fp_class", 1, 1.0)


def test_highest_scored_error_finds_the_box(files):
    # Two localisation errors on one box (IoU 1/3 each, scores 0.9 and 0.8): the box
    # names the higher-scored one (TIDE BestGTMatch).
    _, box, _ = _case(
        files,
        [(PERSON, [0, 0, 10, 10], 0)],
        [(PERSON, [0, 5, 10, 10], 0.8), (PERSON, [5, 0, 10, 10], 0.9)],
    )
    assert box == [("missed_localisation", 1, pytest.approx(1 / 3))]


def test_voc_difficult_is_ignored(tmp_path):
    from evaluation.engine import load_predictions, load_truth

    (tmp_path / "images.csv").write_text("image_id,width,height,tags\nA,500,500,\n")
    (tmp_path / "truth.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max,difficult\nA,person,1,1,100,100,1\n"
    )
    (tmp_path / "pred.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max,score\nA,person,1,1,100,100,0.9\n"
    )
    truth = load_truth(tmp_path / "truth.csv", images=tmp_path / "images.csv")
    records = match(truth, load_predictions(tmp_path / "pred.csv", truth), "voc")
    assert DETECTION_REASONS[records.det_reason[0]] == "ignored"
    assert BOX_REASONS[records.gt_reason[0]] == "ignored"


def test_records_without_reasons_load_and_can_be_completed(files, tmp_path):
    """Records saved before reasons existed load; reasons are refused clearly, and
    ``reasons.attach`` gives the same arrays matching gives."""
    _, _, records = _case(
        files,
        [(PERSON, [0, 0, 10, 10], 0), (CAR, [20, 20, 10, 10], 0)],
        [(PERSON, [0, 0, 10, 10], 0.9), (PERSON, [5, 0, 10, 10], 0.8), (CAR, [20, 21, 10, 9], 0.7)],
    )
    path = tmp_path / "r.npz"
    records.save(path)
    with np.load(path) as data:
        old = {
            k: data[k]
            for k in data.files
            if not k.startswith(("det_box", "det_ref", "det_reason", "gt_re"))
        }
    np.savez_compressed(tmp_path / "old.npz", **old)
    loaded = MatchRecords.load(tmp_path / "old.npz")
    assert not loaded.has_reasons
    with pytest.raises(MissingReasons, match="saved before per-detection reasons existed"):
        loaded.require_reasons()
    attach(loaded, files_truth(files), records.det_box, "coco")
    for name in (
        "det_reason",
        "det_ref_box",
        "det_ref_iou",
        "gt_reason",
        "gt_ref_det",
        "gt_ref_iou",
    ):
        np.testing.assert_array_equal(getattr(loaded, name), getattr(records, name))
    reloaded = MatchRecords.load(path)
    np.testing.assert_array_equal(reloaded.det_box, records.det_box)


def files_truth(files):
    from evaluation.engine import load_truth

    return load_truth(files.root / "truth.json")


def test_export_rows_trace_every_detection_and_box(files, tmp_path):
    """CSV and JSON Lines carry the same rows: one per detection, then one per box, with
    outcome, reason, related box / detection and IoU; numbers round-trip."""
    import csv
    import json

    from evaluation.engine import export

    _, _, records = _case(
        files,
        [(PERSON, [0, 0, 10, 10], 0), (CAR, [30, 30, 10, 10], 0)],
        [(PERSON, [0, 0, 10, 10], 0.9), (PERSON, [5, 0, 10, 10], 0.8), (CAR, [60, 60, 5, 5], 0.1)],
    )
    truth = files_truth(files)
    export.write(tmp_path / "r.csv", records, truth)
    export.write(tmp_path / "r.jsonl", records, truth)
    rows = list(csv.DictReader(open(tmp_path / "r.csv")))
    lines = [json.loads(line) for line in open(tmp_path / "r.jsonl")]
    assert len(rows) == len(lines) == 3 + 2
    assert [r["reason"] for r in rows] == [
        "tp",
        "fp_localisation",
        "fp_background",
        "matched",
        "missed",
    ]
    assert rows[1] | {} == {
        "row": "detection",
        "image_id": "1",
        "class": "person",
        "score": "0.8",
        "x": "5.0",
        "y": "0.0",
        "w": "10.0",
        "h": "10.0",
        "outcome": "fp",
        "reason": "fp_localisation",
        "iou_threshold": "0.5",
        "detection": "1",
        "box_id": "10",
        "related_class": "person",
        "iou": repr(50 / 150),
        "protocol": "coco",
        "engine_version": ENGINE_VERSION,
        "box_policy": "keep",
        "truth_fingerprint": truth.content_hash(),
        "protocol_sha256": PRESETS["coco"].digest(),
    }
    assert lines[2]["box_id"] is None and lines[2]["iou"] is None
    assert lines[3] == {
        "row": "box",
        "image_id": 1,
        "class": "person",
        "score": None,
        "x": 0.0,
        "y": 0.0,
        "w": 10.0,
        "h": 10.0,
        "outcome": "matched",
        "reason": "matched",
        "iou_threshold": 0.5,
        "detection": 0,
        "box_id": 10,
        "related_class": "person",
        "iou": 1.0,
        "protocol": "coco",
        "engine_version": ENGINE_VERSION,
        "box_policy": "keep",
        "truth_fingerprint": truth.content_hash(),
        "protocol_sha256": PRESETS["coco"].digest(),
    }
    assert lines[4]["outcome"] == "missed" and lines[4]["detection"] is None
    for row, line in zip(rows, lines):
        assert float(row["score"] or "nan") == pytest.approx(
            line["score"] or float("nan"), nan_ok=True
        )


def test_export_streams_in_blocks(files):
    """The writer yields one block of rows at a time (a generator), never the whole file."""
    from evaluation.engine import export

    _, _, records = _case(
        files,
        [(PERSON, [0, 0, 10, 10], 0)],
        [(PERSON, [i, 0, 10, 10], 1 - i / 10) for i in range(7)],
    )
    chunks = list(export.csv_chunks(records, files_truth(files), block_rows=2))
    assert len(chunks) == 1 + 4 + 1  # header, 7 detections in blocks of 2, one box
    assert sum(c.count("\n") for c in chunks) == 1 + 7 + 1


def test_match_without_reasons_scores_the_same(files):
    """``match(reasons=False)`` (``evaluate`` without records) keeps no reasons and
    changes no number."""
    from evaluation.engine import score_records

    _, _, records = _case(
        files,
        [(PERSON, [0, 0, 10, 10], 0), (CAR, [30, 30, 10, 10], 0)],
        [(PERSON, [0, 0, 10, 10], 0.9), (PERSON, [5, 0, 10, 10], 0.8), (CAR, [31, 30, 9, 9], 0.7)],
    )
    bare = match(files_truth(files), _predictions(files), "coco", reasons=False)
    assert not bare.has_reasons and records.has_reasons
    assert score_records(bare, "coco") == score_records(records, "coco")


def _predictions(files):
    from evaluation.engine import load_predictions

    return load_predictions(files.root / "predictions.json", files_truth(files))


@pytest.mark.parametrize("protocol", ["coco", "voc", "recall40"])
def test_chunked_pairs_give_the_same_reasons(files, monkeypatch, protocol):
    """Cross-class pairs are walked a chunk of detections at a time; the reasons (and
    each box's best detection, merged across chunks) do not depend on the chunk size."""
    from evaluation.engine import load_predictions, load_truth, reasons

    from .synthetic import make_detections, make_split

    rng = np.random.default_rng(21)
    split = make_split(rng, n_images=12, n_classes=3, boxes_per_image=6)
    gt = files.write("chunk-gt.json", split)
    dt = files.write("chunk-dt.json", make_detections(rng, split, duplicate_rate=0.4))
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    whole = match(truth, predictions, protocol)
    monkeypatch.setattr(reasons, "CHUNK_PAIRS", 7)
    chunked = match(truth, predictions, protocol)
    for name in (
        "det_reason",
        "det_ref_box",
        "det_ref_iou",
        "gt_reason",
        "gt_ref_det",
        "gt_ref_iou",
    ):
        np.testing.assert_array_equal(getattr(chunked, name), getattr(whole, name))
    assert len(set(whole.det_reason.tolist())) >= 5  # the file exercises most reasons


def test_export_of_a_csv_split_keeps_text_image_ids(tmp_path):
    """A CSV split's image ids are text; the export writes them as given."""
    import json

    from evaluation.engine import export, load_predictions, load_truth

    (tmp_path / "images.csv").write_text("image_id,width,height,tags\nfront-0001,500,500,\n")
    (tmp_path / "truth.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max,difficult\nfront-0001,person,1,1,100,100,0\n"
    )
    (tmp_path / "pred.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max,score\nfront-0001,person,1,1,100,100,0.9\n"
    )
    truth = load_truth(tmp_path / "truth.csv", images=tmp_path / "images.csv")
    records = match(truth, load_predictions(tmp_path / "pred.csv", truth), "voc")
    text = "".join(export.jsonl_chunks(records, truth))
    lines = [json.loads(line) for line in text.splitlines()]
    assert [(row["image_id"], row["reason"]) for row in lines] == [
        ("front-0001", "tp"),
        ("front-0001", "matched"),
    ]


def test_export_of_infinite_image_ids_is_strict_json(tmp_path):
    """JSON ``Infinity`` and ``-Infinity`` image ids (Python's json, and so pycocotools,
    reads them as floats): the JSON Lines export writes them as the strings
    "Infinity"/"-Infinity", as every non-finite number there, and stays strict JSON
    (``json.loads`` with ``parse_constant`` refusing the bare literals)."""
    import json

    from evaluation.engine import export, load_predictions, load_truth

    box = {"category_id": 1, "bbox": [1.0, 1.0, 50.0, 50.0]}
    split = {
        "images": [{"id": float("inf")}, {"id": -float("inf")}, {"id": 2.5}],
        "categories": [{"id": 1, "name": "person"}],
        "annotations": [
            {**box, "id": k + 1, "image_id": i, "area": 2500.0, "iscrowd": 0}
            for k, i in enumerate((float("inf"), -float("inf"), 2.5))
        ],
    }
    detections = [{**box, "image_id": float("inf"), "score": 0.9}]
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = load_truth(tmp_path / "gt.json")
    records = match(truth, load_predictions(tmp_path / "dt.json", truth), "coco")
    text = "".join(export.jsonl_chunks(records, truth))

    def refuse(literal):
        raise ValueError(f"not strict JSON: {literal}")

    rows = [json.loads(line, parse_constant=refuse) for line in text.splitlines()]
    assert [row["image_id"] for row in rows] == ["Infinity", "Infinity", "-Infinity", 2.5]


def test_tied_errors_on_one_box_go_to_the_earlier_in_the_file(files):
    """A class error (car detection, IoU 0.9) and a localisation error (person, IoU 1/3)
    on one person box with equal scores: the earlier in the predictions file is the one
    whose fix finds the box (tidecv walks an image's detections in stable score order)."""
    _, box, _ = _case(
        files,
        [(PERSON, [0, 0, 10, 10], 0)],
        [(CAR, [0, 0, 10, 9], 0.8), (PERSON, [5, 0, 10, 10], 0.8)],
    )
    assert box == [("missed_class", 0, pytest.approx(0.9))]
    _, box, _ = _case(
        files,
        [(PERSON, [0, 0, 10, 10], 0)],
        [(PERSON, [5, 0, 10, 10], 0.8), (CAR, [0, 0, 10, 9], 0.8)],
    )
    assert box == [("missed_localisation", 0, pytest.approx(1 / 3))]
