"""``python -m evaluation.engine``: exit 0 with a table or JSON, exit 2 on bad input."""

import json
import subprocess
import sys

import numpy as np
import pytest

from evaluation.engine import (
    COCO_SUMMARY_KEYS,
    PRESETS,
    InputError,
    MatchRecords,
    load_predictions,
    load_truth,
    score_records,
)
from evaluation.engine.__main__ import main

from .synthetic import make_detections, make_split


@pytest.fixture
def inputs(files):
    rng = np.random.default_rng(11)
    split = make_split(rng, n_images=15, n_classes=3)
    return files.write("gt.json", split), files.write("dt.json", make_detections(rng, split))


def test_json_output_has_the_documented_shape(inputs, capsys):
    gt, dt = inputs
    assert main(["score", "--truth", str(gt), "--predictions", str(dt), "--format", "json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert list(result["summary"]) == list(COCO_SUMMARY_KEYS)
    assert result["protocol"] == "coco" and result["engine_version"]
    assert set(result["per_class"]) == {"class1", "class2", "class3"}


@pytest.mark.parametrize("protocol", ["coco", "voc07", "voc", "recall40"])
def test_table_output_for_every_preset(inputs, capsys, protocol):
    gt, dt = inputs
    assert (
        main(["score", "--truth", str(gt), "--predictions", str(dt), "--protocol", protocol]) == 0
    )
    out = capsys.readouterr().out
    version = PRESETS[protocol].version
    assert f"protocol {protocol} v{version}" in out and "per class" in out and "class2" in out


def test_custom_protocol_file(inputs, files, capsys):
    gt, dt = inputs
    spec = files.write(
        "p.json", {"name": "strict", "iou_thresholds": [0.8], "recall_points": "all"}
    )
    assert (
        main(
            [
                "score",
                "--truth",
                str(gt),
                "--predictions",
                str(dt),
                "--protocol",
                str(spec),
                "--format",
                "json",
            ]
        )
        == 0
    )
    assert json.loads(capsys.readouterr().out)["protocol"] == "strict"


def test_records_written_by_the_cli_rescore_identically(inputs, files, capsys):
    gt, dt = inputs
    path = files.root / "records.npz"
    main(
        [
            "score",
            "--truth",
            str(gt),
            "--predictions",
            str(dt),
            "--format",
            "json",
            "--records",
            str(path),
        ]
    )
    printed = json.loads(capsys.readouterr().out)
    again = score_records(MatchRecords.load(path), "coco")
    assert again["summary"] == printed["summary"]
    assert again["per_class"] == printed["per_class"]


def test_unknown_protocol_exits_2(inputs, capsys):
    gt, dt = inputs
    assert main(["score", "--truth", str(gt), "--predictions", str(dt), "--protocol", "kitti"]) == 2
    err = capsys.readouterr().err
    # every preset --protocol takes is listed, the level ones too (they once were not)
    every = "coco, voc07, voc, recall40, kitti2d, miss-rate, miss-rate-cityscale, miss-rate-caltech"
    assert f"not a preset ({every})" in err


def test_missing_predictions_file_exits_2(inputs, capsys):
    gt, _ = inputs
    assert main(["score", "--truth", str(gt), "--predictions", "missing.json"]) == 2
    assert "missing.json: cannot open" in capsys.readouterr().err


def test_a_real_process_prints_no_traceback(inputs, files):
    gt, _ = inputs
    bad = files.write("bad.json", '[{"image_id": 1, "category_id": 1, "bbox": [1, 2], "score": 1}]')
    proc = subprocess.run(
        [
            sys.executable,
            "-m",
            "evaluation.engine",
            "score",
            "--truth",
            str(gt),
            "--predictions",
            str(bad),
        ],
        capture_output=True,
        text=True,
    )
    assert proc.returncode == 2
    assert "bad.json: record 0: field 'bbox': must be 4 numbers [x, y, w, h]" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_a_reader_that_goes_away_gets_no_traceback(inputs):
    """``... | head``: the reader closes the pipe before the table is written. The
    process ends quietly with exit 1 (POSIX: a write to a closed pipe fails with EPIPE;
    Python's signal-module notes give the devnull remedy), not with BrokenPipeError."""
    gt, dt = inputs
    proc = subprocess.Popen(
        [sys.executable, "-m", "evaluation.engine", "score", "--truth", str(gt)]
        + ["--predictions", str(dt)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    proc.stdout.close()  # before the interpreter has even imported the engine
    err = proc.stderr.read()
    assert proc.wait() == 1
    assert "Traceback" not in err and "BrokenPipe" not in err


def test_boxes_option_reaches_the_loaders(files, capsys):
    """--boxes keep (default) scores an overhanging detection as given; clip cuts it;
    reject refuses the file with exit 2 and the record named."""
    gt = files.write(
        "gt.json",
        {
            "images": [{"id": 1, "width": 100, "height": 100}],
            "annotations": [
                {"id": 1, "image_id": 1, "category_id": 1, "bbox": [0, 10, 20, 20], "area": 400}
            ],
            "categories": [{"id": 1, "name": "pedestrian"}],
        },
    )
    dt = files.write(
        "dt.json", [{"image_id": 1, "category_id": 1, "bbox": [-20, 10, 40, 20], "score": 0.9}]
    )
    base = ["score", "--truth", str(gt), "--predictions", str(dt), "--format", "json"]
    aps = {}
    for policy in ("keep", "clip"):
        assert main([*base, "--boxes", policy]) == 0
        result = json.loads(capsys.readouterr().out)
        assert result["counts"]["boxes"]["policy"] == policy
        aps[policy] = result["summary"]["AP"]
    assert aps["keep"] == pytest.approx(0.1) and aps["clip"] == pytest.approx(1.0)
    assert main([*base, "--boxes", "reject"]) == 2
    assert "dt.json: record 0: field 'bbox'" in capsys.readouterr().err


@pytest.mark.parametrize(
    "value",
    # audit12 F9: Python's float reads 1_0, other scripts' digits and 1e-400 (as 0.0)
    ["nan", "inf", "-inf", "abc", "1e400", "1_0", "\u0661", "\uff10.5", "1e-400", " 0.5"],
)
def test_non_finite_threshold_is_refused(inputs, capsys, value):
    """Strict JSON output: a NaN or infinite threshold would be written as NaN/Infinity,
    which is not JSON (RFC 8259); argparse refuses it with exit 2, and so a number not
    written in ASCII decimal digits or too small for a float64 (it would cut at 0)."""
    gt, dt = inputs
    with pytest.raises(SystemExit) as exit_info:
        main(["score", "--truth", str(gt), "--predictions", str(dt), "--threshold", value])
    assert exit_info.value.code == 2
    assert "--threshold" in capsys.readouterr().err


@pytest.mark.parametrize("value", ["0.5", ".5", "5.", "1e-3", "-0", "0e-999", "1E-300"])
def test_decimal_thresholds_are_read(inputs, capsys, value):
    gt, dt = inputs
    argv = ["score", "--truth", str(gt), "--predictions", str(dt), "--format", "json"]
    assert main([*argv, "--threshold", value]) == 0
    assert json.loads(capsys.readouterr().out)["at_threshold"]["threshold"] == float(value)


@pytest.mark.parametrize("name", ["records.csv", "records.jsonl"])
def test_records_out_writes_every_detection_and_box(inputs, files, name):
    """``--records-out`` writes one row per detection and per box (format by extension)."""
    gt, dt = inputs
    out = files.root / name
    assert (
        main(["score", "--truth", str(gt), "--predictions", str(dt), "--records-out", str(out)])
        == 0
    )
    n_dets, n_boxes = (
        len(json.loads(dt.read_text())),
        len(json.loads(gt.read_text())["annotations"]),
    )
    lines = out.read_text().splitlines()
    header = 1 if name.endswith(".csv") else 0
    assert len(lines) == header + n_dets + n_boxes  # no cap binds on these files


def test_records_out_refuses_an_unknown_extension(inputs, files, capsys):
    gt, dt = inputs
    with pytest.raises(SystemExit) as exit_:
        main(["score", "--truth", str(gt), "--predictions", str(dt), "--records-out", "r.txt"])
    assert exit_.value.code == 2 and ".csv or .jsonl" in capsys.readouterr().err


ID_FIELDS = [
    ("gt.json", ("images", 0, "id"), "images[0]: field 'id'"),
    ("gt.json", ("annotations", 0, "id"), "annotations[0]: field 'id'"),
    ("gt.json", ("annotations", 0, "image_id"), "annotations[0]: field 'image_id'"),
    ("gt.json", ("annotations", 0, "category_id"), "annotations[0]: field 'category_id'"),
    ("gt.json", ("categories", 0, "id"), "categories[0]: field 'id'"),
    ("dt.json", (None, 1, "image_id"), "record 1: field 'image_id'"),
    ("dt.json", (None, 1, "category_id"), "record 1: field 'category_id'"),
]


@pytest.mark.parametrize("value", [2**63, 2**64 + 5, -(2**63) - 1, 10**30])
@pytest.mark.parametrize("name, where, locator", ID_FIELDS)
def test_ids_beyond_64_bits_are_refused_under_the_int64_range(files, value, name, where, locator):
    """``ids="int64"`` (the platform's setting): an id outside signed 64 bits, in any
    id field of either file, is an input error naming file, record and field."""
    rng = np.random.default_rng(3)
    split = make_split(rng, n_images=3, n_classes=2, boxes_per_image=3)
    detections = make_detections(rng, split, false_per_image=1)
    section, index, field = where
    (split[section] if section else detections)[index][field] = value
    gt, dt = files.write("gt.json", split), files.write("dt.json", detections)
    with pytest.raises(InputError) as error:
        truth = load_truth(gt, ids="int64")
        load_predictions(dt, truth, ids="int64")
    assert f"{name}: {locator}: {value} is outside the supported range of ids" in str(error.value)


@pytest.mark.parametrize("offset", [2**63, 2**64 + 5, -(2**70), 10**30])
def test_ids_beyond_64_bits_score_like_the_same_ids_shifted_back(files, capsys, offset):
    """JSON allows any integer (RFC 8259) and pycocotools keeps Python ints: the CLI
    scores ids of any size. Every id shifted by the same offset keeps their order, so
    every number equals the unshifted file's; ids are written back exactly."""
    rng = np.random.default_rng(4)
    split = make_split(rng, n_images=6, n_classes=3, boxes_per_image=4)
    detections = make_detections(rng, split, false_per_image=3, score_levels=3)
    outputs = []
    for shift in (0, offset):
        gt_data, dt_data = json.loads(json.dumps(split)), json.loads(json.dumps(detections))
        for item in (*gt_data["images"], *gt_data["categories"], *gt_data["annotations"]):
            item["id"] += shift
        for item in (*gt_data["annotations"], *dt_data):
            item["image_id"] += shift
            item["category_id"] += shift
        gt, dt = files.write("gt.json", gt_data), files.write("dt.json", dt_data)
        out = files.root / f"records{shift}.jsonl"
        argv = ["score", "--truth", str(gt), "--predictions", str(dt), "--format", "json"]
        assert main([*argv, "--records-out", str(out)]) == 0
        result = json.loads(capsys.readouterr().out)
        outputs.append((result["summary"], result["per_class"]))
        rows = [json.loads(line) for line in out.read_text().splitlines()]
        ids = {int(row["image_id"]) for row in rows}
        assert ids <= {im["id"] for im in gt_data["images"]} and ids
    assert outputs[0] == outputs[1]


@pytest.mark.parametrize("protocol", sorted(PRESETS))
def test_nan_and_infinity_inputs_give_strict_json_output(files, capsys, tmp_path, protocol):
    """Inputs holding NaN/Infinity literals are scored; the CLI's JSON and the JSON
    Lines export stay strict JSON (RFC 8259 has no NaN): Python's json, told to
    refuse the literals, reads them back."""
    gt = files.write(
        "gt.json",
        '{"images": [{"id": 1}], "categories": [{"id": 1, "name": "car"}], "annotations": '
        '[{"id": 1, "image_id": 1, "category_id": 1, "bbox": [0, 0, 10, NaN], "area": NaN}]}',
    )
    dt = files.write(
        "dt.json",
        '[{"image_id": 1, "category_id": 1, "bbox": [0, 0, 10, 10], "score": NaN},'
        ' {"image_id": 1, "category_id": 1, "bbox": [0, Infinity, 10, 10], "score": -Infinity}]',
    )
    out = tmp_path / "records.jsonl"
    argv = ["score", "--truth", str(gt), "--predictions", str(dt), "--format", "json"]
    assert main([*argv, "--protocol", protocol, "--records-out", str(out)]) == 0

    def refuse(literal):
        raise AssertionError(f"non-strict JSON: {literal}")

    result = json.loads(capsys.readouterr().out, parse_constant=refuse)
    assert result["counts"]["boxes"]["predictions"]["non_finite_score"] == 2
    rows = [json.loads(line, parse_constant=refuse) for line in out.read_text().splitlines()]
    assert {row["score"] for row in rows if row["row"] == "detection"} == {"NaN", "-Infinity"}
