"""PASCAL VOC detection result files as predictions: the development kit's layout
(Everingham et al., IJCV 2010; ``VOCevaldet.m`` reads ``%s_det_%s_%s.txt`` — competition
id, image set, class — with ``textread(..., '%s %f %f %f %f %f')``: one detection a line,
``image_id score xmin ymin xmax ymax``, pixel-inclusive corners). A folder or zip of
them scores exactly as the same detections given as COCO JSON, under every preset;
errors name the file, its line and the field."""

import json
import zipfile

import numpy as np
import pytest

from evaluation.engine import (
    InputError,
    detect_format,
    evaluate,
    load_predictions,
    load_truth,
)
from evaluation.engine.__main__ import main

from .synthetic import make_detections, make_split


def _scenario(seed):
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=15, n_classes=3, crowd_rate=0.0, integer_coords=True)
    detections = make_detections(rng, split, hit_rate=0.8, false_per_image=2)
    for d in detections:  # integer corners: xmax - xmin is then exactly the width
        d["bbox"] = [float(round(v)) for v in d["bbox"]]
        d["score"] = round(d["score"], 2)  # ties, so file order decides some ranks
    return split, detections


def _write_results(folder, split, detections, comp="comp4", image_set="test"):
    """One devkit result file per class, each class's detections in their JSON order."""
    folder.mkdir(parents=True, exist_ok=True)
    names = {c["id"]: c["name"] for c in split["categories"]}
    for cid, name in names.items():
        with open(folder / f"{comp}_det_{image_set}_{name}.txt", "w") as f:
            for d in detections:
                if d["category_id"] == cid:
                    x, y, w, h = d["bbox"]
                    f.write(
                        f"{d['image_id']:06d} {d['score']:.6f} {x:g} {y:g} {x + w:g} {y + h:g}\n"
                    )
    return folder


def _zip(folder, target):
    with zipfile.ZipFile(target, "w") as z:
        for path in sorted(folder.iterdir()):
            z.write(path, f"results/VOC2007/Main/{path.name}")
    return target


@pytest.mark.parametrize("protocol", ["voc07", "voc", "coco"])
@pytest.mark.parametrize("packed", [False, True])
def test_result_files_score_as_the_same_detections_in_coco_json(tmp_path, protocol, packed):
    split, detections = _scenario(3)
    # Group by class so JSON file order within a class is the result file's order.
    detections.sort(key=lambda d: d["category_id"])
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = load_truth(tmp_path / "gt.json")
    folder = _write_results(tmp_path / "results", split, detections)
    source = _zip(folder, tmp_path / "results.zip") if packed else folder
    assert detect_format(source) == "voc_det"
    ours = evaluate(truth, load_predictions(source, truth), protocol)
    reference = evaluate(truth, load_predictions(tmp_path / "dt.json", truth), protocol)
    assert ours["summary"] == reference["summary"]
    assert ours["per_class"] == reference["per_class"]


def test_named_format_and_a_class_name_holding_underscores(tmp_path):
    split, detections = _scenario(4)
    split["categories"][0]["name"] = "traffic_light"
    split["categories"][1]["name"] = "light"
    (tmp_path / "gt.json").write_text(json.dumps(split))
    truth = load_truth(tmp_path / "gt.json")
    folder = _write_results(tmp_path / "r", split, detections, image_set="val_2026")
    predictions = load_predictions(folder, truth, fmt="voc_det")
    assert len(predictions.score) == len(detections)
    per_class = np.bincount(predictions.cls, minlength=3).tolist()
    assert per_class == [sum(d["category_id"] == c for d in detections) for c in (1, 2, 3)]


@pytest.fixture
def case(tmp_path):
    split, detections = _scenario(5)
    (tmp_path / "gt.json").write_text(json.dumps(split))
    truth = load_truth(tmp_path / "gt.json")
    folder = _write_results(tmp_path / "r", split, detections)
    name = split["categories"][0]["name"]
    return truth, folder, folder / f"comp4_det_test_{name}.txt"


def _error(folder, truth, **options):
    with pytest.raises(InputError) as caught:
        load_predictions(folder, truth, **options)
    return caught.value


@pytest.mark.parametrize(
    "line, field, message",
    [
        ("000001 0.5 1 2 3", None, "expected 6 fields (image_id score xmin ymin xmax ymax), got 5"),
        ("000001 high 1 2 3 4", "score", "expected a number, got 'high'"),
        ("000001 0.5 1 2 x 4", "xmax", "expected a number, got 'x'"),
    ],
)
def test_a_bad_line_names_file_line_and_field(case, line, field, message):
    truth, folder, first = case
    first.write_text(first.read_text() + line + "\n")
    lines = len(first.read_text().splitlines())
    error = _error(folder, truth)
    assert error.record == f"{first.name} line {lines}" and (error.field or None) == field
    assert message in str(error)


def test_an_unknown_image_names_its_line(case):
    truth, folder, first = case
    first.write_text("999999 0.5 1 2 3 4\n")
    error = _error(folder, truth)
    assert error.record == f"{first.name} line 1" and error.field == "image_id"


def test_a_file_of_an_unknown_class_is_refused_or_dropped(case):
    truth, folder, _ = case
    (folder / "comp4_det_test_bus.txt").write_text(f"{truth.image_ids[0]:06d} 0.5 1 2 3 4\n")
    error = _error(folder, truth, unknown_classes="reject")
    assert "class 'bus' is not one of the split's classes" in str(error)
    assert error.record == "comp4_det_test_bus.txt line 1" and error.field == "file name"
    assert load_predictions(folder, truth).dropped == 1  # the default, as pycocotools


def test_two_files_of_one_class_and_result_files_as_ground_truth_are_refused(case, tmp_path):
    truth, folder, first = case
    (folder / first.name.replace("comp4", "comp3")).write_text(first.read_text())
    assert "two result files for class" in str(_error(folder, truth))
    with pytest.raises(InputError, match="hold detections only"):
        load_truth(folder)


@pytest.mark.parametrize("protocol", ["voc07", "coco"])
def test_a_lone_result_file_scores_as_its_class_given_in_coco_json(tmp_path, protocol, capsys):
    """One class's result file on its own (``comp4_det_test_<class>.txt``, the class
    from its name as the devkit's ``VOCopts.detrespath`` names it) scores as that
    class's detections in COCO JSON, the other classes undetected."""
    split, detections = _scenario(6)
    detections.sort(key=lambda d: d["category_id"])
    (tmp_path / "gt.json").write_text(json.dumps(split))
    truth = load_truth(tmp_path / "gt.json")
    folder = _write_results(tmp_path / "r", split, detections)
    name = split["categories"][1]["name"]
    lone = folder / f"comp4_det_test_{name}.txt"
    assert detect_format(lone) == "voc_det"
    only = [d for d in detections if d["category_id"] == split["categories"][1]["id"]]
    (tmp_path / "dt.json").write_text(json.dumps(only))
    ours = evaluate(truth, load_predictions(lone, truth, cache_dir=tmp_path / "c"), protocol)
    reference = evaluate(truth, load_predictions(tmp_path / "dt.json", truth), protocol)
    assert ours["summary"] == reference["summary"] and ours["per_class"] == reference["per_class"]
    # the command line reads it the same way
    args = ["score", "--truth", str(tmp_path / "gt.json"), "--predictions", str(lone)]
    assert main([*args, "--protocol", protocol, "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out)["summary"] == reference["summary"]
    # the same bytes under another class's name are that class's detections (the
    # cache keys a lone result file by its name too)
    other = split["categories"][0]["name"]
    renamed = tmp_path / f"comp4_det_test_{other}.txt"
    renamed.write_bytes(lone.read_bytes())
    again = load_predictions(renamed, truth, cache_dir=tmp_path / "c")
    assert set(np.asarray(truth.classes)[again.cls]) == {other}


def test_a_lone_result_file_names_its_line_and_field(case):
    truth, _, first = case
    first.write_text(first.read_text() + "000001 0.5 1 2 x 4\n")
    error = _error(first, truth)
    lines = len(first.read_text().splitlines())
    assert error.record == f"{first.name} line {lines}" and error.field == "xmax"
    assert "expected a number, got 'x'" in str(error)
