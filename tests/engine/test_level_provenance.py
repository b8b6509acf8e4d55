"""Level results (KITTI difficulty levels, pedestrian setups) carry the same protocol
record, engine version, ground-truth fingerprint and counts as every other result, and
``explain`` compares them with any other result (issue: protocol record on every number).
"""

import json

import numpy as np
import pytest

from evaluation.engine import ENGINE_VERSION, PRESETS, load_truth
from evaluation.engine.__main__ import main
from evaluation.engine.level_provenance import LEVEL_PRESETS

from .synthetic import make_detections, make_split
from .test_provenance import RECORD_KEYS

RESULT_KEYS = {"protocol_record", "engine_version", "truth_fingerprint", "counts"}


@pytest.fixture
def road(files):
    rng = np.random.default_rng(5)
    split = make_split(rng, n_images=10, n_classes=4, crowd_rate=0.0)
    # class names the level protocols evaluate (case as the file gives them)
    names = ["Car", "Pedestrian", "Van", "tram"]
    for category, name in zip(split["categories"], names):
        category["name"] = name
    for k, a in enumerate(split["annotations"]):
        a["occlusion"], a["truncation"], a["visibility"] = k % 3, 0.1 * (k % 4), 0.9
    return files.write("gt.json", split), files.write("dt.json", make_detections(rng, split))


def _score(gt, dt, capsys, protocol):
    argv = ["score", "--truth", str(gt), "--predictions", str(dt), "--format", "json"]
    assert main([*argv, "--protocol", protocol]) == 0
    return json.loads(capsys.readouterr().out)


@pytest.mark.parametrize("protocol", [*PRESETS, *LEVEL_PRESETS])
def test_every_preset_cli_json_has_the_full_record(road, capsys, protocol):
    gt, dt = road
    result = _score(gt, dt, capsys, protocol)
    assert RESULT_KEYS <= set(result)
    assert RECORD_KEYS <= set(result["protocol_record"])
    assert result["engine_version"] == ENGINE_VERSION
    assert result["truth_fingerprint"] == load_truth(gt).content_hash()
    counts = result["counts"]
    assert (counts["images"], counts["truth_boxes"]) == (
        10,
        len(json.loads(gt.read_text())["annotations"]),
    )
    assert counts["boxes"]["policy"] == "keep"
    assert result["protocol_record"]["box_policy"] == "keep"


def test_kitti_record_says_how_it_matches_and_which_classes(road, capsys):
    gt, dt = road
    record = _score(gt, dt, capsys, "kitti2d")["protocol_record"]
    assert "overlap strictly above" in record["matching"]  # devkit: overlap > threshold
    assert record["class_iou_thresholds"] == {"Car": 0.7, "Pedestrian": 0.5}
    assert record["recall_sampling"]["count"] == 41  # devkit N_SAMPLE_PTS
    assert record["averaged_classes"] == ["Car", "Pedestrian"]
    assert record["absent_classes"]["Van"].startswith("a neighbouring class")
    assert record["absent_classes"]["tram"] == "not a class of the protocol"
    assert [lv["name"] for lv in record["levels"]] == ["easy", "moderate", "hard"]


def test_miss_rate_record_names_the_toolbox_rule(road, capsys):
    gt, dt = road
    record = _score(gt, dt, capsys, "miss-rate")["protocol_record"]
    assert "intersection over the detection's area" in record["matching"]
    assert record["recall_sampling"]["count"] == 9  # nine FPPI points 10^-2..10^0
    assert record["class_iou_thresholds"]["Car"] == 0.5
    cityscale = _score(gt, dt, capsys, "miss-rate-cityscale")["protocol_record"]
    assert cityscale["detection_cap"] == {
        "max_detections": [1000],
        "kind": "per image and class, highest scores first",
    }


def test_explain_between_kitti2d_and_coco_names_the_differences(road, files, capsys):
    gt, dt = road
    a = files.write("kitti.json", _score(gt, dt, capsys, "kitti2d"))
    b = files.write("coco.json", _score(gt, dt, capsys, "coco"))
    assert main(["explain", str(a), str(b)]) == 0
    out = capsys.readouterr().out
    for setting in (
        "* name",
        "* matching",
        "* iou thresholds",
        "* class iou thresholds",
        "* recall sampling",
        "* interpolation",
        "* detection cap",
        "* tie order",
        "* area source",
        "* size ranges",
        "* averaged classes",
    ):
        assert setting in out, setting
    assert "ground truth" not in out.split("* ")[0]  # same split: same fingerprint
    assert "how detections claim boxes" in out
    assert main(["explain", str(a), str(a)]) == 0
    assert "same protocol" in capsys.readouterr().out


def _effects(out):
    """{setting: its effect line} of an ``explain`` text."""
    blocks = out.split("\n\n")[1:]
    return {b.splitlines()[0][2:]: b.splitlines()[3].strip() for b in blocks}


def test_explain_between_miss_rate_readings_speaks_of_miss_rate(road, files, capsys):
    """The toolbox's and the city-scale code's readings differ in FPPI points, clamp, cap
    and empty budget: each effect is said in miss-rate terms (FPPI, log-average), never
    in AP's (precision along recall)."""
    gt, dt = road
    a = files.write("toolbox.json", _score(gt, dt, capsys, "miss-rate"))
    b = files.write("city.json", _score(gt, dt, capsys, "miss-rate-cityscale"))
    assert main(["explain", str(a), str(b)]) == 0
    effects = _effects(capsys.readouterr().out)
    for setting in ("recall sampling", "interpolation", "detection cap", "fppi points", "clamp"):
        assert setting in effects, setting
    assert "FPPI" in effects["recall sampling"] and "miss rate" in effects["interpolation"]
    assert "log-average" in effects["clamp"] and "1 (toolbox)" in effects["empty budget"]
    for setting, words in effects.items():
        assert "AP" not in words.split() and "precision" not in words, (setting, words)
        assert words != "a different setting.", setting


def test_explain_between_ap_and_miss_rate_says_the_measures_differ(road, files, capsys):
    gt, dt = road
    a = files.write("coco.json", _score(gt, dt, capsys, "coco"))
    b = files.write("mr.json", _score(gt, dt, capsys, "miss-rate"))
    assert main(["explain", str(a), str(b)]) == 0
    effects = _effects(capsys.readouterr().out)
    assert list(effects)[:3] == ["name", "version", "metric"]  # the measure comes early
    assert effects["version"] == "the versions of two different protocols (see name)."
    assert effects["metric"].startswith("a different measure: AP (higher is better)")


def test_explain_between_kitti_and_voc07_speaks_of_the_devkits_sampling(road, files, capsys):
    gt, dt = road
    a = files.write("kitti.json", _score(gt, dt, capsys, "kitti2d"))
    b = files.write("voc07.json", _score(gt, dt, capsys, "voc07"))
    assert main(["explain", str(a), str(b)]) == 0
    effects = _effects(capsys.readouterr().out)
    assert "recall steps of 1/40" in effects["recall sampling"]
    assert effects["size ranges"].startswith("levels have no size buckets")
    assert all(words != "a different setting." for words in effects.values()), effects
