"""Every result says under which exact protocol it was computed; ``explain`` says, in
words, which settings differ between two results (issue: protocol record)."""

import json
import sys

import numpy as np
import pytest

from evaluation.engine import evaluate, load_predictions, load_truth, protocol_from_dict
from evaluation.engine.__main__ import main

from .synthetic import make_detections, make_split

RECORD_KEYS = {
    "zero_id",
    "difficult",
    "name",
    "version",
    "matching",
    "iou_thresholds",
    "class_iou_thresholds",
    "recall_sampling",
    "interpolation",
    "precision_epsilon",
    "detection_cap",
    "tie_order",
    "pixel_offset",
    "box_policy",
    "area_source",
    "size_ranges",
    "miss_rate",
    "operating_point",
    "averaged_classes",
    "absent_classes",
}


@pytest.fixture
def inputs(files):
    rng = np.random.default_rng(21)
    split = make_split(rng, n_images=12, n_classes=3, crowd_rate=0.0)
    detections = make_detections(rng, split)
    split["categories"].append({"id": 7, "name": "tram"})  # no box at all
    split["categories"].append({"id": 8, "name": "bus"})  # only a crowd box
    split["annotations"].append(
        {
            "id": 10_000,
            "image_id": split["images"][0]["id"],
            "category_id": 8,
            "bbox": [1, 1, 40, 40],
            "iscrowd": 1,
        }
    )
    return files.write("gt.json", split), files.write("dt.json", detections)


def _score(gt, dt, capsys, *extra):
    assert (
        main(["score", "--truth", str(gt), "--predictions", str(dt), "--format", "json", *extra])
        == 0
    )
    return json.loads(capsys.readouterr().out)


def test_cli_json_carries_the_full_record(inputs, capsys):
    gt, dt = inputs
    result = _score(gt, dt, capsys, "--protocol", "voc07", "--boxes", "clip")
    record = result["protocol_record"]
    assert set(record) == RECORD_KEYS
    assert (record["name"], record["matching"], record["tie_order"]) == (
        "voc07",
        "best_overlap",
        "file",
    )
    assert record["recall_sampling"]["points"][3] == 0.30000000000000004
    assert (record["pixel_offset"], record["box_policy"]) == (1.0, "clip")
    assert record["detection_cap"] == {"max_detections": [None], "kind": "none"}
    assert record["class_iou_thresholds"] == {
        c: 0.5 for c in ("class1", "class2", "class3", "tram", "bus")
    }
    assert record["absent_classes"] == {
        "tram": "no ground-truth box",
        "bus": "all 1 ground-truth boxes are ignored (crowd, difficult or ignore flags)",
    }
    assert record["averaged_classes"] == ["class1", "class2", "class3"]
    assert result["truth_fingerprint"] == load_truth(gt).content_hash()
    assert result["engine_version"]


def test_evaluate_records_per_class_thresholds_actually_applied(inputs):
    gt, dt = inputs
    truth = load_truth(gt)
    custom = protocol_from_dict(
        {"name": "c", "base": "recall40", "class_iou_thresholds": {"Class2": 0.65}}
    )
    result = evaluate(truth, load_predictions(dt, truth), custom)
    assert result["protocol_record"]["class_iou_thresholds"]["class2"] == 0.65
    assert result["protocol_record"]["class_iou_thresholds"]["class1"] == 0.5


def test_explain_names_each_differing_setting_and_its_effect(inputs, files, capsys):
    gt, dt = inputs
    a = files.write("a.json", _score(gt, dt, capsys))
    b = files.write("b.json", _score(gt, dt, capsys, "--protocol", "voc", "--boxes", "clip"))
    assert main(["explain", str(a), str(b)]) == 0
    out = capsys.readouterr().out
    for setting in (
        "matching",
        "iou thresholds",
        "recall sampling",
        "tie order",
        "pixel offset",
        "box policy",
        "detection cap",
        "zero id",
    ):
        assert f"* {setting}\n" in out, setting
    assert "A: greedy" in out and "B: best_overlap" in out
    assert "+1 pixel convention" in out and "clipping changes the IoU" in out
    assert "matched to the box of annotation id 0" in out  # coco's rule, not voc's
    assert "* ground truth" not in out and "* engine version" not in out  # same data, engine


def test_explain_same_protocol_and_other_data(inputs, files, capsys):
    gt, dt = inputs
    a = files.write("a.json", _score(gt, dt, capsys))
    assert main(["explain", str(a), str(a)]) == 0
    assert "same protocol, engine and ground truth" in capsys.readouterr().out
    other = json.loads(json.dumps(json.loads(a.read_text())))
    other["truth_fingerprint"] = "0" * 64
    b = files.write("b.json", other)
    assert main(["explain", str(a), str(b)]) == 0
    assert "different ground truth" in capsys.readouterr().out


def test_explain_names_a_different_score_threshold(inputs, files, capsys):
    """Red team audit12 F4: two results of one file at ``--threshold`` 0.5 and 0.3 differ
    in their operating point (``at_threshold``), which ``explain`` called "the same"."""
    gt, dt = inputs
    a = files.write("a.json", _score(gt, dt, capsys))
    b = files.write("b.json", _score(gt, dt, capsys, "--threshold", "0.3"))
    assert json.loads(a.read_text())["at_threshold"] != json.loads(b.read_text())["at_threshold"]
    assert main(["explain", str(a), str(b)]) == 0
    out = capsys.readouterr().out
    assert out.startswith("1 setting(s) differ") and "* score threshold" in out, out
    assert "A: 0.5" in out and "B: 0.3" in out and "AP, recall at the cap" in out


def test_explain_refuses_a_result_without_record(files, capsys):
    a = files.write("a.json", {"summary": {}})
    assert main(["explain", str(a), str(a)]) == 2
    assert "a.json: field 'protocol_record': no protocol record" in capsys.readouterr().err


def test_explain_refuses_an_integer_beyond_pythons_digit_limit(inputs, files, capsys):
    """A JSON integer of more digits than ``sys.get_int_max_str_digits()`` (4300 by
    default; Python docs, "Integer string conversion length limitation"): Python's json
    raises ValueError on it (red team audit11 F6: ``explain`` stopped with an internal
    error). Refused as ``score`` refuses it, naming the file, the field and the place."""
    gt, dt = inputs
    a = files.write("a.json", _score(gt, dt, capsys))
    edited = json.loads(a.read_text())
    edited["protocol_record"]["precision_epsilon"] = "@"
    digits = "1" * (sys.get_int_max_str_digits() + 1)
    text = json.dumps(edited).replace('"@"', digits, 1)
    b = files.root / "b.json"
    b.write_text(text)
    assert main(["explain", str(a), str(b)]) == 2
    err = capsys.readouterr().err
    assert "b.json: field 'precision_epsilon': an integer of more than" in err
    assert "internal error" not in err
    # A number of as many digits with a fraction is a float to Python's json: read.
    b.write_text(text.replace(digits, digits + ".0", 1))
    assert main(["explain", str(a), str(b)]) == 0


@pytest.mark.parametrize("value", [{"a": 1}, [1, 2], 3])
def test_explain_reads_a_hand_edited_record_of_any_json(inputs, files, capsys, value):
    """A record's ``metric`` or ``kind`` edited into an object or a list (found by the
    fourth red team: ``explain`` stopped with an internal error): any JSON value there
    is a differing setting shown as written, and the command ends normally."""
    gt, dt = inputs
    a = files.write("a.json", _score(gt, dt, capsys))
    edited = json.loads(a.read_text())
    edited["protocol_record"]["metric"] = value
    edited["protocol_record"]["kind"] = value
    b = files.write("b.json", edited)
    assert main(["explain", str(a), str(b)]) == 0
    out = capsys.readouterr().out
    assert "* metric\n" in out and "* kind\n" in out
