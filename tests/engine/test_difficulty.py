"""The KITTI 2D difficulty-level protocol against the devkit's rules.

Source: the KITTI object development kit (Geiger et al., CVPR 2012),
``cpp/evaluate_object.cpp``; ``oracle.kitti_*`` is a transliteration written from its
published logic (``cleanData``, ``computeStatistics``, ``getThresholds``,
``eval_class``, ``imageBoxOverlap``). Hand-built cases show each rule changing the
result, with the arithmetic; random scenes compare every precision slot with the
oracle. Scenes are written as KITTI label folders and read by the engine's loader, so
the oracle sees exactly the devkit's input.
"""

import json

import numpy as np
import pytest

from evaluation.engine import load_predictions, load_truth
from evaluation.engine.difficulty import evaluate_levels, level_counts

from . import oracle

LEVELS = ("easy", "moderate", "hard")


def _gt(kind, x1, y1, x2, y2, trunc=0.0, occ=0):
    return (kind, *(float(v) for v in (x1, y1, x2, y2, trunc)), int(occ))


def _det(kind, x1, y1, x2, y2, score):
    return (kind, *(float(v) for v in (x1, y1, x2, y2, score)))


def _write(folder, scenes, detections):
    folder.mkdir(parents=True, exist_ok=True)
    for i, objects in enumerate(scenes):
        rows = [
            f"{k} {t!r} {o} -10 {x1!r} {y1!r} {x2!r} {y2!r} 1.5 1.6 3.9 1 2 30 0.1"
            for k, x1, y1, x2, y2, t, o in objects
        ]
        (folder / f"{i:06d}.txt").write_text("".join(r + "\n" for r in rows))
    det_folder = folder.parent / (folder.name + "_det")
    det_folder.mkdir(exist_ok=True)
    for i, dets in enumerate(detections):
        rows = [
            f"{k} -1 -1 -10 {x1!r} {y1!r} {x2!r} {y2!r} -1 -1 -1 -1000 -1000 -1000 -10 {s!r}"
            for k, x1, y1, x2, y2, s in dets
        ]
        (det_folder / f"{i:06d}.txt").write_text("".join(r + "\n" for r in rows))
    truth = load_truth(folder, fmt="kitti")
    return truth, load_predictions(det_folder, truth, fmt="kitti")


def _ours(tmp_path, scenes, detections):
    truth, predictions = _write(tmp_path / "gt", scenes, detections)
    return evaluate_levels(truth, predictions, "kitti2d")


def _oracle(cls, scenes, detections, level):
    precision, n_gt = oracle.kitti_eval_class(cls, scenes, detections, LEVELS.index(level))
    return precision, n_gt


def _slots(result, level, cls):
    return result["levels"][level]["classes"][cls]


def test_two_cars_arithmetic(tmp_path):
    """n_gt = 2; TP scores [0.9, 0.7] (B at 0.8 hits nothing). getThresholds keeps
    both: at i=0 recall 1/2 is kept (it always is), i=1 is the last. At 0.9: TP 1, FP 0
    -> 1; at 0.7: TP 2, FP 1 -> 2/3. Slots [1, 2/3, 0 x 39]: AP_R40 = (2/3)/40,
    AP_R11 = 1/11 (slot 0 only). With two boxes the devkit fills two slots: its
    sampling assumes n_gt >= 40."""
    scenes = [[_gt("Car", 0, 0, 100, 50), _gt("Car", 200, 0, 300, 50)]]
    dets = [
        [
            _det("Car", 0, 0, 100, 50, 0.9),
            _det("Car", 500, 0, 600, 50, 0.8),
            _det("Car", 200, 0, 300, 50, 0.7),
        ]
    ]
    result = _ours(tmp_path, scenes, dets)
    moderate = _slots(result, "moderate", "Car")
    assert moderate["precision"][:3] == [1.0, 2 / 3, 0.0]
    assert moderate["AP_R40"] == pytest.approx((2 / 3) / 40, abs=1e-15)
    assert moderate["AP_R11"] == pytest.approx(1 / 11, abs=1e-15)
    assert result["headline"] == moderate["AP_R40"]  # the only class present
    assert oracle.kitti_ap(_oracle("car", scenes, dets, "moderate")[0]) == pytest.approx(
        (moderate["AP_R40"], moderate["AP_R11"]), abs=1e-15
    )


def test_height_at_the_minimum_is_ignored(tmp_path):
    """cleanData ignores a box with height <= the minimum: a 40 px car is outside easy
    (absent there: n_gt 0) and counted at moderate (> 25), where its detection is a TP:
    slot 0 = 1, AP_R11 = 1/11."""
    scenes = [[_gt("Car", 0, 0, 100, 40)]]
    dets = [[_det("Car", 0, 0, 100, 40, 0.9)]]
    result = _ours(tmp_path, scenes, dets)
    assert _slots(result, "easy", "Car")["AP_R40"] is None
    assert _slots(result, "easy", "Car")["n_gt"] == 0 == _oracle("car", scenes, dets, "easy")[1]
    assert _slots(result, "moderate", "Car")["AP_R11"] == pytest.approx(1 / 11)


def test_occlusion_and_truncation_levels(tmp_path):
    """Occlusion 1 leaves easy (max 0); truncation 0.4 leaves easy and moderate (max
    0.15, 0.30) but not hard (0.50); a -1 (not given) passes every level, as in the
    devkit (-1 exceeds no maximum). Counted: easy 1, moderate 2, hard 3."""
    scenes = [
        [
            _gt("Car", 0, 0, 100, 50, 0.0, 1),
            _gt("Car", 200, 0, 300, 50, 0.4, 0),
            _gt("Car", 400, 0, 500, 50, -1.0, -1),
        ]
    ]
    result = _ours(tmp_path, scenes, [[]])
    counts = [_slots(result, level, "Car")["n_gt"] for level in LEVELS]
    assert counts == [1, 2, 3]
    assert counts == [_oracle("car", scenes, [[]], level)[1] for level in LEVELS]


def test_neighbouring_class_absorbs_a_detection(tmp_path):
    """A car detection on a Van is neither TP nor FP for cars; on a Truck it is an FP.
    Two cars counted, detections: car1 0.9, on the van/truck 0.8, car2 0.7.
    Van: slots [1, 1] -> AP_R11 = 1/11 (slot 0) and AP_R40 = 1/40 (slot 1).
    Truck: slots [1, 2/3] -> AP_R40 = (2/3)/40."""
    base = [_gt("Car", 0, 0, 100, 50), _gt("Car", 200, 0, 300, 50)]
    dets = [
        [
            _det("Car", 0, 0, 100, 50, 0.9),
            _det("Car", 400, 0, 500, 50, 0.8),
            _det("Car", 200, 0, 300, 50, 0.7),
        ]
    ]
    with_van = _ours(tmp_path / "van", [base + [_gt("Van", 400, 0, 500, 50)]], dets)
    with_truck = _ours(tmp_path / "truck", [base + [_gt("Truck", 400, 0, 500, 50)]], dets)
    assert _slots(with_van, "moderate", "Car")["precision"][:2] == [1.0, 1.0]
    assert _slots(with_truck, "moderate", "Car")["precision"][:2] == [1.0, 2 / 3]
    for scene, result in (("Van", with_van), ("Truck", with_truck)):
        scenes = [base + [_gt(scene, 400, 0, 500, 50)]]
        assert (
            _oracle("car", scenes, dets, "moderate")[0]
            == _slots(result, "moderate", "Car")["precision"]
        )


def test_dont_care_region_removes_a_false_positive(tmp_path):
    """The FP at 0.8 lies in a DontCare region: intersection over its own area 1 >
    0.7, so it is not counted; slots [1, 2/3] become [1, 1]. Half inside (0.5 <= 0.7)
    it still counts."""
    cars = [_gt("Car", 0, 0, 100, 50), _gt("Car", 200, 0, 300, 50)]
    dets = [
        [
            _det("Car", 0, 0, 100, 50, 0.9),
            _det("Car", 400, 0, 500, 50, 0.8),
            _det("Car", 200, 0, 300, 50, 0.7),
        ]
    ]
    inside = [cars + [_gt("DontCare", 390, -10, 520, 60, -1.0, -1)]]
    half = [cars + [_gt("DontCare", 450, 0, 600, 50, -1.0, -1)]]
    result = _ours(tmp_path / "in", inside, dets)
    assert _slots(result, "moderate", "Car")["precision"][:2] == [1.0, 1.0]
    result = _ours(tmp_path / "half", half, dets)
    assert _slots(result, "moderate", "Car")["precision"][:2] == [1.0, 2 / 3]
    assert _oracle("car", half, dets, "moderate")[0][:2] == [1.0, 2 / 3]


def test_small_detection_of_any_class_is_ignored_and_can_take_a_box(tmp_path):
    """cleanData tests the detection's height before its class: a 24.9 px pedestrian
    detection (int 24 < 25) is an *ignored* detection in the car evaluation. At 0.95 it
    outscores the car detection (0.9) on a 26 px car (IoU 24.9/26 > 0.7), takes the box
    in the threshold pass, so no TP score is collected: no threshold, every slot 0."""
    scenes = [[_gt("Car", 0, 0, 100, 26), _gt("Pedestrian", 300, 0, 320, 60)]]
    dets = [[_det("Pedestrian", 0, 0, 100, 24.9, 0.95), _det("Car", 0, 0, 100, 26, 0.9)]]
    result = _ours(tmp_path / "a", scenes, dets)
    assert _slots(result, "moderate", "Car")["precision"] == [0.0] * 41
    assert _oracle("car", scenes, dets, "moderate")[0] == [0.0] * 41
    lower = [[dets[0][0][:5] + (0.85,), dets[0][1]]]  # the car detection first: a TP
    result = _ours(tmp_path / "b", scenes, lower)
    assert _slots(result, "moderate", "Car")["precision"][0] == 1.0


def test_overlap_must_exceed_the_threshold(tmp_path):
    """IoU exactly 0.7 (3500 / 5000) is not a match for a car; 71 px wide (0.71) is."""
    scenes = [[_gt("Car", 0, 0, 100, 50)]]
    exact = _ours(tmp_path / "a", scenes, [[_det("Car", 0, 0, 70, 50, 0.9)]])
    above = _ours(tmp_path / "b", scenes, [[_det("Car", 0, 0, 71, 50, 0.9)]])
    assert _slots(exact, "moderate", "Car")["precision"][0] == 0.0
    assert _slots(above, "moderate", "Car")["precision"][0] == 1.0


def test_threshold_pass_takes_the_highest_score_strictly_above(tmp_path):
    """getThresholds collects the TP scores of the first pass, where a box takes the
    highest-scoring detection with overlap *above* 0.7: A (0.9) at IoU exactly 0.7 is
    no candidate, B (0.8, IoU 1) is, so the one threshold is 0.8. At 0.8 both are
    available: B is the TP, A an FP: slot 0 = 1/2. (Were A a candidate, the threshold
    would be 0.9 and slot 0 = 0.)"""
    scenes = [[_gt("Car", 0, 0, 100, 50)]]
    dets = [[_det("Car", 0, 0, 70, 50, 0.9), _det("Car", 0, 0, 100, 50, 0.8)]]
    result = _ours(tmp_path, scenes, dets)
    assert _slots(result, "moderate", "Car")["precision"][0] == 0.5
    assert _oracle("car", scenes, dets, "moderate")[0][0] == 0.5


def test_counting_pass_takes_the_greatest_overlap(tmp_path):
    """At a threshold a box takes the detection of greatest overlap, not score. Boxes
    G1 [0,0,100,50], G2 [20,0,120,50] (file order), G3 elsewhere; A [10,0,110,50] at
    0.9 overlaps both (4500/5500 = 0.818), B = G1 at 0.8 overlaps G1 (1.0) and G2
    (4000/6000 = 0.667, no), C = G3 at 0.5. First pass (by score): G1 takes A, G2
    nothing, G3 takes C: thresholds [0.9, 0.5]. At 0.9: A on G1, slot 1. At 0.5: G1
    takes B (1.0 > 0.818), G2 takes A, G3 takes C: 3 TP, 0 FP -> slot 1 = 1. (By
    score G1 would take A, leaving B an FP: 2/3.)"""
    scenes = [[_gt("Car", 0, 0, 100, 50), _gt("Car", 20, 0, 120, 50), _gt("Car", 300, 0, 400, 50)]]
    dets = [
        [
            _det("Car", 10, 0, 110, 50, 0.9),
            _det("Car", 0, 0, 100, 50, 0.8),
            _det("Car", 300, 0, 400, 50, 0.5),
        ]
    ]
    result = _ours(tmp_path, scenes, dets)
    assert _slots(result, "moderate", "Car")["precision"][:3] == [1.0, 1.0, 0.0]
    assert _oracle("car", scenes, dets, "moderate")[0][:3] == [1.0, 1.0, 0.0]


def _random_scene(rng, n_images=12):
    kinds = ["Car", "Car", "Car", "Van", "Pedestrian", "Pedestrian", "Person_sitting"]
    kinds += ["Cyclist", "Truck"]
    scenes, detections = [], []
    for _ in range(n_images):
        objects, dets = [], []
        for _ in range(rng.integers(0, 9)):
            kind = kinds[rng.integers(len(kinds))]
            x1, y1 = rng.integers(0, 300) * 2.0, rng.integers(0, 60) * 2.0
            w, h = rng.integers(5, 60) * 2.0, rng.choice([20.0, 24.5, 25.0, 26.0, 40.0, 50.0, 80.0])
            trunc = float(rng.choice([-1.0, 0.0, 0.15, 0.2, 0.3, 0.45, 0.6]))
            occ = int(rng.choice([-1, 0, 1, 2, 3]))
            objects.append(_gt(kind, x1, y1, x1 + w, y1 + h, trunc, occ))
            for _ in range(rng.integers(0, 3)):  # jittered detections, some on it
                dx, dy = rng.integers(-6, 7) * 1.0, rng.integers(-4, 5) * 1.0
                det_kind = kind if rng.random() < 0.8 else kinds[rng.integers(len(kinds))]
                score = float(rng.choice([0.3, 0.5, 0.5, 0.7, 0.9]) + rng.integers(0, 3) / 100)
                dets.append(_det(det_kind, x1 + dx, y1 + dy, x1 + w + dx, y1 + h - dy, score))
        if rng.random() < 0.3:
            x1 = rng.integers(0, 300) * 2.0
            objects.append(_gt("DontCare", x1, 0.0, x1 + 80, 60.0, -1.0, -1))
        for _ in range(rng.integers(0, 4)):  # clutter
            x1, y1 = rng.integers(0, 300) * 2.0, rng.integers(0, 60) * 2.0
            kind = kinds[rng.integers(len(kinds))]
            dets.append(_det(kind, x1, y1, x1 + 40, y1 + float(rng.integers(15, 60)), 0.4))
        rng.shuffle(objects)
        rng.shuffle(dets)
        scenes.append([tuple(o) for o in objects])
        detections.append([tuple(d) for d in dets])
    # every type once, so every detection type is a class of the split
    scenes.append(
        [_gt(k, 10.0 * i, 300.0, 10.0 * i + 8, 380.0, 0.0, 0) for i, k in enumerate(kinds)]
    )
    detections.append([])
    return scenes, detections


@pytest.mark.parametrize("seed, n_images", [(s, 12) for s in range(12)] + [(100, 150), (101, 150)])
def test_random_scenes_equal_the_devkit_rules(tmp_path, seed, n_images):
    """Every precision slot, level and class equals the transliterated devkit
    (detection types are kept within the split's classes: the engine refuses others
    by default, the devkit would read them)."""
    rng = np.random.default_rng(seed)
    scenes, detections = _random_scene(rng, n_images)  # 150 images: n_gt > 40, skipping
    truth, predictions = _write(tmp_path / "gt", scenes, detections)
    result = evaluate_levels(truth, predictions, "kitti2d")
    for level in LEVELS:
        for cls, name in (("car", "Car"), ("pedestrian", "Pedestrian"), ("cyclist", "Cyclist")):
            if name not in truth.classes:
                continue
            expected, n_gt = _oracle(cls, scenes, detections, level)
            ours = _slots(result, level, name)
            assert ours["n_gt"] == n_gt == level_counts(truth)["levels"][level][name]
            if n_gt:
                np.testing.assert_allclose(ours["precision"], expected, rtol=0, atol=1e-15)
                r40, r11 = oracle.kitti_ap(expected)
                assert ours["AP_R40"] == pytest.approx(r40, abs=1e-15)
                assert ours["AP_R11"] == pytest.approx(r11, abs=1e-15)


def test_command_line(tmp_path, capsys):
    from evaluation.engine.__main__ import main

    scenes = [[_gt("Car", 0, 0, 100, 50), _gt("Car", 200, 0, 300, 50)]]
    dets = [[_det("Car", 0, 0, 100, 50, 0.9), _det("Car", 200, 0, 300, 50, 0.7)]]
    _write(tmp_path / "gt", scenes, dets)
    argv = ["score", "--truth", str(tmp_path / "gt"), "--predictions", str(tmp_path / "gt_det")]
    assert main([*argv, "--protocol", "kitti2d", "--format", "json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["levels"]["moderate"]["classes"]["Car"]["precision"][:2] == [1.0, 1.0]
    assert main([*argv, "--protocol", "kitti2d"]) == 0
    assert "moderate  Car" in capsys.readouterr().out
    assert main([*argv, "--protocol", "kitti2d", "--records", str(tmp_path / "r.npz")]) == 2
    assert "keeps no match records" in capsys.readouterr().err


def test_level_counts_for_the_split_page(tmp_path):
    """Counted boxes per level and class (the devkit's n_gt), regions, attributes."""
    scenes = [
        [
            _gt("Car", 0, 0, 100, 50, 0.0, 0),
            _gt("Car", 0, 0, 100, 30, 0.0, 0),  # 30 px: moderate and hard only
            _gt("Car", 0, 0, 100, 50, 0.4, 2),  # hard only
            _gt("Van", 0, 0, 100, 50),
            _gt("DontCare", 0, 0, 10, 10, -1.0, -1),
        ]
    ]
    truth, _ = _write(tmp_path / "gt", scenes, [[]])
    counts = level_counts(truth)
    assert counts["levels"] == {"easy": {"Car": 1}, "moderate": {"Car": 2}, "hard": {"Car": 3}}
    assert counts["dont_care_regions"] == 1
    assert counts["attributes_given"] == {"occlusion": 4, "truncation": 4, "visibility": 0}
