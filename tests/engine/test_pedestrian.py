"""Pedestrian setups for the log-average miss rate against the published rules.

Sources: the pedestrian detection toolbox of Dollár et al. (TPAMI 34(4), 2012),
``bbGt.m`` ``evalRes`` / ``compOas`` / ``compRoc`` and ``dbEval.m``; the city-scale
benchmark's evaluation (Zhang et al., CVPR 2017), ``eval_MR_multisetup.py``.
``pedestrian_oracle`` transliterates both, written from the published code's logic.
Hand-built cases show each rule changing the result, with the arithmetic; random
scenes compare every setup's miss rates with both transliterations. Scenes are written
as COCO-style JSON (visibility key, ``iscrowd``, top-level ``dont_care`` regions) and
read by the engine's loader.
"""

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import load_predictions, load_truth
from evaluation.engine.pedestrian import (
    MISS_RATE,
    MISS_RATE_CITYSCALE,
    evaluate_setups,
    read_references,
    setup_counts,
)

from . import label_writers, pedestrian_oracle

SETUPS = ("reasonable", "small", "heavy", "all")
CLASSES = ["pedestrian", "people"]


def _box(x, y, w, h, vis=None, cls="pedestrian", crowd=False, ignore=False):
    return {
        "cls": cls,
        "bbox": [float(x), float(y), float(w), float(h)],
        "vis": vis,
        "crowd": crowd,
        "ignore": ignore,
    }


def _files(root, scene):
    """Write a scene (list of images: {"gt": [box], "regions": [xywh], "dt": [(xywh,
    score, cls)]}) as COCO-style JSON and load it."""
    images = {i + 1: (640, 480) for i in range(len(scene))}
    boxes, regions, dets = [], [], []
    for i, image in enumerate(scene, start=1):
        for b in image.get("gt", ()):
            attrs = {} if b["vis"] is None else {"visibility": b["vis"]}
            if b["crowd"]:
                attrs["iscrowd"] = 1
            if b.get("ignore"):
                attrs["ignore"] = 1
            boxes.append((i, b["cls"], b["bbox"], attrs))
        regions += [(i, list(map(float, r))) for r in image.get("regions", ())]
        for d in image.get("dt", ()):
            xywh, score = d[0], d[1]
            cls = d[2] if len(d) > 2 else "pedestrian"
            dets.append((i, cls, list(map(float, xywh)), score))
    gt_path = label_writers.coco(root / "gt.json", images, CLASSES, boxes, regions)
    dt_path = label_writers.coco(root / "dt.json", images, CLASSES, [], detections=dets)
    truth = load_truth(gt_path)
    return truth, load_predictions(dt_path, truth)


def _oracle_scene(scene, crowd_read=True):
    """The same scene in the transliteration's terms (pedestrian detections only).
    ``crowd_read=False``: the city-scale code's input, which never reads ``iscrowd``
    (its ignore flag is the ``ignore`` key; neighbours and regions map to ignore 1)."""
    out = []
    for image in scene:
        gt = []
        for b in image.get("gt", ()):
            crowd = b["crowd"] and crowd_read
            flag = crowd or b.get("ignore") or b["cls"] != "pedestrian"
            gt.append((*b["bbox"], b["vis"], int(flag)))
        gt += [(*map(float, r), None, 1) for r in image.get("regions", ())]
        dt = [
            (*map(float, d[0]), d[1])
            for d in image.get("dt", ())
            if (d[2] if len(d) > 2 else "pedestrian") == "pedestrian"
        ]
        out.append((gt, dt))
    return out


def _ours(tmp_path, scene, protocol="miss-rate"):
    truth, predictions = _files(tmp_path, scene)
    return evaluate_setups(truth, predictions, protocol)


def _row(result, setup):
    return result["levels"][setup]["classes"]["pedestrian"]


def _lamr(miss):
    """dbEval: exp(mean(log(max(1e-10, miss))))."""
    return math.exp(sum(math.log(max(1e-10, m)) for m in miss) / len(miss))


def _check_both(tmp_path, scene):
    for protocol, reference in (
        ("miss-rate", pedestrian_oracle.toolbox),
        ("miss-rate-cityscale", pedestrian_oracle.cityscale),
        ("miss-rate-caltech", lambda s, setup: pedestrian_oracle.toolbox(s, setup, caltech=True)),
    ):
        oracle_scene = _oracle_scene(scene, crowd_read=protocol != "miss-rate-cityscale")
        result = _ours(tmp_path, scene, protocol)
        for setup in SETUPS:
            expected, miss = reference(oracle_scene, setup)
            row = _row(result, setup)
            if expected is None:
                assert row["miss_rate"] is None, (protocol, setup)
                continue
            assert row["miss_rate"] == pytest.approx(expected, rel=1e-12, abs=1e-300), (
                protocol,
                setup,
            )
            assert row["reference_miss_rate"] == pytest.approx(miss, abs=1e-15)


# --- one rule per case ------------------------------------------------------------


def test_setup_moves_a_box_between_counted_and_ignored(tmp_path):
    """A 60 px box with visibility 0.5 and its exact detection. reasonable (v >= 0.65):
    the box is an ignore box, the detection matches it by intersection over its own
    area (1.0 >= 0.5) and is ignored; the only counted box (80 px, v 0.9) is missed ->
    recall 0 everywhere, MR 1 at all nine points, LAMR 1. heavy (0.20 <= v <= 0.65):
    the 0.5 box counts and is found at FPPI 0 -> MR 0 -> clamped 1e-10 -> LAMR 1e-10;
    the 80 px box is ignored there."""
    scene = [
        {
            "gt": [_box(0, 0, 30, 80, 0.9), _box(100, 0, 25, 60, 0.5)],
            "dt": [([100, 0, 25, 60], 0.9)],
        }
    ]
    result = _ours(tmp_path, scene)
    assert _row(result, "reasonable")["miss_rate"] == 1.0
    assert _row(result, "reasonable")["detections"]["ignored"] == 1
    assert _row(result, "heavy")["miss_rate"] == pytest.approx(1e-10, rel=1e-12)
    assert _row(result, "heavy")["n_gt"] == 1
    _check_both(tmp_path, scene)


def test_ignore_region_uses_the_detections_own_area(tmp_path):
    """A 200x200 don't-care region; detection A (20x50) lies inside it: IoU with the
    region = 1000/40000 = 0.025, but intersection over A's area = 1000/1000 = 1 >= 0.5
    -> ignored. Detection B (20x50) overlaps it by 8x50: 400/1000 = 0.4 < 0.5 -> a
    false positive. With one counted box found first (score 0.9) in 2 images: points
    (FPPI 0, recall 1), then B: (0.5, 1): MR 0 everywhere -> LAMR 1e-10; without the
    own-area rule A would be an FP too. Scoring B above the TP: B at FPPI 0.5 first,
    so for f < 0.5 the toolbox reads the start point (MR 1): points 1e-2 .. 10^-0.5
    (7 of them) MR 1, 10^-0.25 and 1 MR 0 -> LAMR = exp((7 ln 1 + 2 ln 1e-10)/9)
    = 1e-10^(2/9)."""
    region = [300, 0, 200, 200]
    a = ([350, 50, 20, 50], 0.8)
    b = ([492, 50, 20, 50], 0.7)
    scene = [
        {"gt": [_box(0, 0, 30, 80, 1.0)], "regions": [region], "dt": [([0, 0, 30, 80], 0.9), a, b]},
        {},
    ]
    row = _row(_ours(tmp_path, scene), "reasonable")
    assert row["detections"] == {
        "true_positive": 1,
        "false_positive": 1,
        "ignored": 1,
        "outside_height": 0,
    }
    assert row["miss_rate"] == pytest.approx(1e-10, rel=1e-12)
    _check_both(tmp_path, scene)
    scene[0]["dt"] = [([0, 0, 30, 80], 0.6), a, b]
    row = _row(_ours(tmp_path, scene), "reasonable")
    assert row["miss_rate"] == pytest.approx(1e-10 ** (2 / 9), rel=1e-12)
    _check_both(tmp_path, scene)


def test_regular_boxes_come_before_ignore_boxes(tmp_path):
    """Detection D = [0, 0, 30, 80] over a counted box G = [0, 10, 30, 80] (IoU =
    30*70 / (2400 + 2400 - 2100) = 2100/2700 = 0.778) and a crowd box covering it
    (intersection over D's area 1.0, larger): evalRes takes the regular box first, so D
    is a TP (recall 1, LAMR 1e-10), not ignored (recall 0, LAMR 1)."""
    scene = [
        {
            "gt": [_box(-10, -10, 100, 200, 1.0, crowd=True), _box(0, 10, 30, 80, 1.0)],
            "dt": [([0, 0, 30, 80], 0.9)],
        }
    ]
    row = _row(_ours(tmp_path, scene), "reasonable")
    assert row["detections"]["true_positive"] == 1
    assert row["miss_rate"] == pytest.approx(1e-10, rel=1e-12)
    _check_both(tmp_path, scene)


def test_ignore_box_absorbs_any_number(tmp_path):
    """Three detections inside one ``people`` box (a neighbouring label, so an ignore
    box): all ignored, no FP; a regular box would take only one (the others FPs)."""
    scene = [
        {
            "gt": [_box(0, 0, 30, 80, 1.0), _box(100, 0, 120, 100, cls="people")],
            "dt": [([0, 0, 30, 80], 0.5)] + [([100 + 30 * k, 0, 30, 80], 0.9) for k in range(3)],
        }
    ]
    row = _row(_ours(tmp_path, scene), "reasonable")
    assert row["detections"]["ignored"] == 3
    assert row["detections"]["false_positive"] == 0
    assert row["miss_rate"] == pytest.approx(1e-10, rel=1e-12)
    assert "people" not in _ours(tmp_path, scene)["levels"]["reasonable"]["classes"]
    _check_both(tmp_path, scene)


def test_height_expansion_keeps_and_drops_detections(tmp_path):
    """reasonable keeps detections with 50/1.25 = 40 <= h: a 40 px false positive is
    kept (FPPI 1 over 1 image), a 39.5 px one dropped; small keeps h < 75*1.25 = 93.75:
    a 93.75 px detection is dropped, 93.5 kept. The counted box is found last (score
    0.1), so with the FP kept its point is at FPPI 1: MR 1 at the eight references
    below 1 and 0 at 1 -> LAMR = (1e-10)^(1/9); with it dropped LAMR 1e-10."""
    gt = [_box(0, 0, 30, 60, 1.0)]
    hit = ([0, 0, 30, 60], 0.1)
    cases = [
        ("reasonable", [300, 0, 20, 40], 1e-10 ** (1 / 9)),
        ("reasonable", [300, 0, 20, 39.5], 1e-10),
        ("small", [300, 0, 40, 93.5], 1e-10 ** (1 / 9)),
        ("small", [300, 0, 40, 93.75], 1e-10),
    ]
    for setup, box, expected in cases:
        scene = [{"gt": gt, "dt": [hit, (box, 0.9)]}]
        row = _row(_ours(tmp_path, scene), setup)
        assert row["miss_rate"] == pytest.approx(expected, rel=1e-12), (setup, box)
        assert row["detections"]["outside_height"] == (expected == 1e-10)
        _check_both(tmp_path, scene)


def test_equal_overlaps_go_to_the_last_box(tmp_path):
    """evalRes replaces the best on oa >= best, so of two regular boxes with equal IoU
    the later one is taken. A = [0, 0, 30, 80], B = [10, 0, 30, 80]; D1 = [5, 0, 30,
    80] (0.9) overlaps both by 25*80 / (4800 - 2000) = 0.714 and takes B; D2 = [-5, 0,
    30, 80] (0.8) overlaps A by 0.714 and B by 15*80 / (4800 - 1200) = 0.333, takes A:
    two TPs, LAMR 1e-10. Taking the first (A) would leave D2 an FP: recall 1/2 at
    FPPI 0 and 1 -> LAMR 0.5."""
    scene = [
        {
            "gt": [_box(0, 0, 30, 80, 1.0), _box(10, 0, 30, 80, 1.0)],
            "dt": [([5, 0, 30, 80], 0.9), ([-5, 0, 30, 80], 0.8)],
        }
    ]
    row = _row(_ours(tmp_path, scene), "reasonable")
    assert row["detections"]["true_positive"] == 2
    assert row["miss_rate"] == pytest.approx(1e-10, rel=1e-12)
    _check_both(tmp_path, scene)


def test_overlap_of_exactly_one_half_matches(tmp_path):
    """evalRes continues only if oa < thr, so IoU = 0.5 matches: box 20x100, detection
    20x50 on its top half: 1000 / (2000 + 1000 - 1000) = 0.5 -> TP, LAMR 1e-10."""
    scene = [{"gt": [_box(0, 0, 20, 100, 1.0)], "dt": [([0, 0, 20, 50], 0.9)]}]
    row = _row(_ours(tmp_path, scene), "reasonable")
    assert row["detections"]["true_positive"] == 1
    _check_both(tmp_path, scene)


def test_boxes_and_flags_decide_counted_boxes(tmp_path):
    """n_gt per setup: a 60 px box without visibility (read as fully visible: in
    reasonable, small, all; not heavy), a 100 px box at v 0.3 (heavy, all), a 19 px
    box (none), a crowd box (none), a 75 px box at v 0.65 (closed ranges: reasonable,
    small, heavy, all)."""
    scene = [
        {
            "gt": [
                _box(0, 0, 20, 60),
                _box(50, 0, 40, 100, 0.3),
                _box(100, 0, 10, 19, 1.0),
                _box(150, 0, 30, 80, 1.0, crowd=True),
                _box(200, 0, 30, 75, 0.65),
            ]
        }
    ]
    truth, _ = _files(tmp_path, scene)
    counts = setup_counts(truth)
    assert {s: counts[s]["pedestrian"] for s in SETUPS} == {
        "reasonable": 2,
        "small": 2,
        "heavy": 2,
        "all": 3,
    }
    result = _ours(tmp_path, scene)
    assert {s: _row(result, s)["n_gt"] for s in SETUPS} == {
        s: counts[s]["pedestrian"] for s in SETUPS
    }


def test_lamr_arithmetic_over_images(tmp_path):
    """FPPI divides by every image of the split. 4 images, 4 counted boxes (one each);
    detections by score: TP, FP, TP, FP, TP; the 4th box is missed. Points: (0, 1/4), (1/4, 1/4), (1/4, 2/4), (2/4, 2/4), (2/4, 3/4).
    References 0.01..0.1778 (6 of them) read FPPI 0 -> MR 3/4; 0.3162 reads FPPI 1/4 ->
    MR 2/4; 0.5623 and 1 read FPPI 2/4 -> MR 1/4. LAMR = exp((6 ln .75 + ln .5 +
    2 ln .25)/9)."""
    scene = [
        {"gt": [_box(0, 0, 30, 80, 1.0)], "dt": [([0, 0, 30, 80], 0.9), ([300, 0, 30, 80], 0.8)]},
        {"gt": [_box(0, 0, 30, 80, 1.0)], "dt": [([0, 0, 30, 80], 0.7), ([300, 0, 30, 80], 0.6)]},
        {"gt": [_box(0, 0, 30, 80, 1.0)], "dt": [([0, 0, 30, 80], 0.5)]},
        {"gt": [_box(0, 0, 30, 80, 1.0)]},
    ]
    row = _row(_ours(tmp_path, scene), "reasonable")
    expected = math.exp((6 * math.log(0.75) + math.log(0.5) + 2 * math.log(0.25)) / 9)
    assert row["miss_rate"] == pytest.approx(expected, rel=1e-12)
    assert row["reference_miss_rate"] == pytest.approx([0.75] * 6 + [0.5, 0.25, 0.25])
    assert row["curve"] == {"fppi": [0.0, 0.25, 0.5], "miss_rate": [0.75, 0.5, 0.25]}
    _check_both(tmp_path, scene)


# --- where the toolbox and the city-scale code differ ---------------------------


def test_empty_budget_toolbox_reads_miss_one_cityscale_the_last_recall(tmp_path):
    """One image, two counted boxes; an FP (0.9) before a TP (0.8): points (1, 0),
    (1, 1/2). Toolbox: below FPPI 1 only the start point -> MR 1 at eight references,
    MR 1/2 at 1 -> LAMR = 0.5^(1/9) = 0.9259. City-scale: searchsorted gives index -1
    for the eight, which reads the last recall 1/2 -> MR 1/2 everywhere -> LAMR 0.5."""
    scene = [
        {
            "gt": [_box(0, 0, 30, 80, 1.0), _box(100, 0, 30, 80, 1.0)],
            "dt": [([300, 0, 30, 80], 0.9), ([0, 0, 30, 80], 0.8)],
        }
    ]
    toolbox = _row(_ours(tmp_path, scene), "reasonable")
    city = _row(_ours(tmp_path, scene, "miss-rate-cityscale"), "reasonable")
    assert toolbox["miss_rate"] == pytest.approx(0.5 ** (1 / 9), rel=1e-12)
    assert city["miss_rate"] == pytest.approx(0.5, rel=1e-12)
    _check_both(tmp_path, scene)


def test_clamp_toolbox_only(tmp_path):
    """Every box found before any FP: MR 0 at all references. Toolbox clamps to 1e-10
    (LAMR 1e-10); the city-scale code takes log(0) = -inf -> LAMR 0."""
    scene = [{"gt": [_box(0, 0, 30, 80, 1.0)], "dt": [([0, 0, 30, 80], 0.9)]}]
    assert _row(_ours(tmp_path, scene), "reasonable")["miss_rate"] == pytest.approx(1e-10)
    assert _row(_ours(tmp_path, scene, "miss-rate-cityscale"), "reasonable")["miss_rate"] == 0.0
    _check_both(tmp_path, scene)


def test_caltech_standardises_aspect_ratio(tmp_path):
    """dbEval resizes counted boxes and detections to w = 0.41 h about the centre. Box
    [0, 0, 60, 100], detection [17, 0, 26, 100]: as given IoU = 2600 / 6000 = 0.433 <
    0.5 -> an FP and a miss, LAMR 1. Resized: d = 41 - 60 = -19, box [9.5, 0, 41, 100];
    d = 41 - 26 = 15, detection [9.5, 0, 41, 100]: IoU 1 -> TP, LAMR 1e-10."""
    scene = [{"gt": [_box(0, 0, 60, 100, 1.0)], "dt": [([17, 0, 26, 100], 0.9)]}]
    assert _row(_ours(tmp_path, scene), "reasonable")["miss_rate"] == 1.0
    row = _row(_ours(tmp_path, scene, "miss-rate-caltech"), "reasonable")
    assert row["miss_rate"] == pytest.approx(1e-10, rel=1e-12)
    _check_both(tmp_path, scene)


def test_caltech_resizes_detections_before_the_ignore_rule(tmp_path):
    """A don't-care region [0, 0, 40, 100] (not resized: ignore boxes keep their shape)
    and detection D = [-20, 0, 100, 100] (0.9). As given, D's intersection over its own
    area is 40*100 / 10000 = 0.4 < 0.5 -> an FP before the TP (0.5): FPPI 1 first, LAMR
    (1e-10)^(1/9). Resized (d = 41 - 100 = -59), D = [9.5, 0, 41, 100]: 30.5*100 / 4100
    = 0.744 -> ignored, LAMR 1e-10."""
    scene = [
        {
            "gt": [_box(300, 0, 41, 100, 1.0)],
            "regions": [[0, 0, 40, 100]],
            "dt": [([-20, 0, 100, 100], 0.9), ([300, 0, 41, 100], 0.5)],
        }
    ]
    row = _row(_ours(tmp_path, scene), "reasonable")
    assert row["miss_rate"] == pytest.approx(1e-10 ** (1 / 9), rel=1e-12)
    row = _row(_ours(tmp_path, scene, "miss-rate-caltech"), "reasonable")
    assert row["detections"]["ignored"] == 1
    assert row["miss_rate"] == pytest.approx(1e-10, rel=1e-12)
    _check_both(tmp_path, scene)


def test_caltech_upper_height_is_open(tmp_path):
    """dbEval's filterGtFun keeps h < hr(2): a 75 px box is counted in small under the
    city-scale closed range [50, 75] and the default, ignored under miss-rate-caltech
    (n_gt 0: absent)."""
    scene = [{"gt": [_box(0, 0, 30, 75, 1.0)], "dt": [([0, 0, 30, 75], 0.9)]}]
    assert _row(_ours(tmp_path, scene), "small")["n_gt"] == 1
    assert _row(_ours(tmp_path, scene, "miss-rate-caltech"), "small")["miss_rate"] is None
    _check_both(tmp_path, scene)


def test_rounded_reference_points():
    """FPPI 89/5000 = 0.0178 is at or below the city-scale's rounded 0.0178 but above
    10^-1.75 = 0.017783: a TP reached there counts at the 2nd reference for the
    city-scale code only. Two counted boxes: TP at FPPI 0, then 89 FPs, then a TP."""
    fp = np.r_[0.0, np.arange(1, 90), 89.0]
    tp = np.r_[1.0, np.ones(89), 2.0]
    toolbox, _ = read_references(tp, fp, 2, 5000, MISS_RATE)
    city, _ = read_references(tp, fp, 2, 5000, MISS_RATE_CITYSCALE)
    assert toolbox.tolist() == [0.5, 0.5] + [0.0] * 7
    assert city.tolist() == [0.5, 0.0] + [0.0] * 7


def test_cityscale_keeps_the_top_thousand_per_image(tmp_path):
    """One image with 1,000 FPs scored above its only TP, in a split of 2,000 images:
    toolbox: the TP arrives at FPPI 1000/2000 = 0.5 -> MR 0 at 10^-0.25 and 1, MR 1 at
    the seven below -> LAMR = 1e-10^(2/9). City-scale: the TP is the 1,001st detection
    of its image, dropped -> MR 1 everywhere -> LAMR 1."""
    dets = [([300 + (k % 10), 0, 30, 80], 0.9) for k in range(1000)] + [([0, 0, 30, 80], 0.1)]
    scene = [{"gt": [_box(0, 0, 30, 80, 1.0)], "dt": dets}] + [{}] * 1999
    assert _row(_ours(tmp_path, scene), "reasonable")["miss_rate"] == pytest.approx(
        1e-10 ** (2 / 9), rel=1e-12
    )
    assert _row(_ours(tmp_path, scene, "miss-rate-cityscale"), "reasonable")["miss_rate"] == 1.0


def test_no_counted_box_is_absent_and_no_detection_is_one(tmp_path):
    """A setup without counted boxes is absent (None; dbEval divides by zero, the
    city-scale code skips it). Counted boxes and no detection: recall 0 -> LAMR 1."""
    scene = [{"gt": [_box(0, 0, 30, 80, 1.0)]}]
    result = _ours(tmp_path, scene)
    assert _row(result, "heavy")["miss_rate"] is None
    assert result["levels"]["heavy"]["miss_rate"] is None
    assert _row(result, "reasonable")["miss_rate"] == 1.0
    assert result["headline"] == 1.0
    _check_both(tmp_path, scene)


# --- random scenes against both transliterations --------------------------------

_finite = st.integers(0, 12).map(lambda v: v * 10.0)
# now and then a non-finite corner: MATLAB's min/max omit a NaN, Python's keep it first
_coord = st.integers(0, 15).map(
    lambda v: v * 10.0 if v <= 12 else [-math.inf, math.inf, math.nan][v - 13]
)
_height = st.sampled_from([15.0, 19.0, 20.0, 39.5, 40.0, 50.0, 60.0, 75.0, 80.0, 93.75, 120.0])
_vis = st.sampled_from([None, 0.1, 0.2, 0.5, 0.65, 0.8, 1.0])
# width / height; 0.41 is dbEval's standard; inf: an endless box (x + w NaN from -inf)
_aspect = st.sampled_from([0.3, 0.41, 0.6] * 3 + [math.inf])


@st.composite
def _scenes(draw):
    n_images = draw(st.integers(1, 4))
    scene = []
    for _ in range(n_images):
        gt = []
        for _ in range(draw(st.integers(0, 4))):
            cls = draw(st.sampled_from(["pedestrian"] * 4 + ["people"]))
            h = draw(_height)
            gt.append(
                _box(
                    draw(_coord),
                    draw(_coord),
                    h * draw(_aspect),
                    h,
                    draw(_vis),
                    cls,
                    draw(st.booleans()) and draw(st.booleans()) and draw(st.booleans()),
                )
            )
        n_regions = draw(st.integers(0, 1))  # finite: a non-finite region is left unread
        regions = [[draw(_finite), draw(_finite), 60.0, 90.0] for _ in range(n_regions)]
        dt = []
        for _ in range(draw(st.integers(0, 6))):
            if gt and draw(st.booleans()):
                x, y, w, h = draw(st.sampled_from(gt))["bbox"]
                jitter = draw(st.sampled_from([0.0, 2.0, 5.0, 12.0]))
                box = [x + jitter, y, w, h + draw(st.sampled_from([0.0, -10.0, 10.0]))]
            else:
                h = draw(_height)
                box = [draw(_coord), draw(_coord), h * draw(_aspect), h]
            score = draw(st.sampled_from([0.1, 0.3, 0.5, 0.7, 0.9]))
            cls = draw(st.sampled_from(["pedestrian"] * 5 + ["people"]))
            dt.append((box, score, cls))
        scene.append({"gt": gt, "regions": regions, "dt": dt})
    return scene


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(scene=_scenes())
def test_random_scenes_agree_with_both_transliterations(tmp_path, scene):
    """Tied scores across images, crowd boxes, neighbouring labels, regions, heights
    on every boundary (19/20, 39.5/40, 50, 75, 93.75), visibility on 0.2/0.65, and
    non-finite corners (x or y NaN or infinite, endless widths: x + w NaN)."""
    _check_both(tmp_path, scene)


def test_cli_prints_setups_and_strict_json(tmp_path, capsys):
    """``--protocol miss-rate`` / ``miss-rate-cityscale``: a table, or strict JSON with
    the full protocol record; no match records for a setup protocol (exit 2)."""
    import json

    from evaluation.engine.__main__ import main

    scene = [
        {
            "gt": [_box(0, 0, 30, 80, 1.0), _box(100, 0, 30, 80, 1.0)],
            "dt": [([300, 0, 30, 80], 0.9), ([0, 0, 30, 80], 0.8)],
        }
    ]
    _files(tmp_path, scene)
    argv = [
        "score",
        "--truth",
        str(tmp_path / "gt.json"),
        "--predictions",
        str(tmp_path / "dt.json"),
    ]
    assert main([*argv, "--protocol", "miss-rate-cityscale", "--format", "json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["headline"] == pytest.approx(0.5, rel=1e-12)
    assert result["protocol"]["variant"] == "cityscale"
    assert result["protocol"]["levels"][1] == {
        "name": "small",
        "height": [50.0, 75.0],
        "visibility": [0.65, 1e10],  # Params.VisRng's open end 1e5 ** 2
    }
    assert result["truth_fingerprint"]
    assert main([*argv, "--protocol", "miss-rate"]) == 0
    out = capsys.readouterr().out
    assert "reasonable  pedestrian" in out and "0.9259" in out
    assert main([*argv, "--protocol", "miss-rate", "--records", str(tmp_path / "r.npz")]) == 2


def test_a_nan_score_ranks_first_in_the_toolbox_and_last_in_the_city_scale_code(tmp_path):
    """MATLAB's ``sort(score, 'descend')`` puts NaN first (the toolbox's evalRes and
    compRoc), numpy's argsort last (the city-scale code). One box, its TP at 0.9 and an
    FP scored NaN. Toolbox: [FP, TP]: points (1, 0), (1, 1): below FPPI 1 only the start
    -> MR 1 at eight references, 0 (clamped to 1e-10) at 1 -> LAMR = 1e-10^(1/9).
    City-scale: [TP, FP]: recall 1 at FPPI 0 -> MR 0 everywhere -> LAMR 0."""
    scene = [
        {
            "gt": [_box(0, 0, 30, 100, 1.0)],
            "dt": [([0, 0, 30, 100], 0.9), ([300, 0, 30, 100], float("nan"))],
        }
    ]
    toolbox = _row(_ours(tmp_path, scene), "reasonable")
    city = _row(_ours(tmp_path, scene, "miss-rate-cityscale"), "reasonable")
    assert toolbox["miss_rate"] == pytest.approx(1e-10 ** (1 / 9), rel=1e-12)
    assert city["miss_rate"] == 0.0
    _check_both(tmp_path, scene)


def test_an_ignore_key_makes_an_ignore_box(tmp_path):
    """A COCO JSON annotation's ``ignore`` key (as pedestrian annotation files carry it;
    pycocotools never reads it, so ``coco`` does not) makes an ignore box here. The
    ignore box's exact detection is ignored and the other box is missed: miss rate 1
    at every reference -> LAMR 1 (were the key not read: recall 1/2 -> LAMR 1/2)."""
    scene = [
        {
            "gt": [_box(0, 0, 30, 80, 1.0, ignore=True), _box(100, 0, 30, 80, 1.0)],
            "dt": [([0, 0, 30, 80], 0.9)],
        }
    ]
    assert _row(_ours(tmp_path, scene), "reasonable")["miss_rate"] == pytest.approx(1.0)
    _check_both(tmp_path, scene)


def test_a_nan_corner_is_omitted_by_matlab_and_kept_first_by_python(tmp_path):
    """``compOas`` with a NaN corner (toolbox ``bbGt.m``, from memory; MATLAB's
    ``min``/``max`` omit NaN, MathWorks documentation). Detection D = [NaN, 0, 30, 100]
    over counted box G = [0, 0, 30, 100]; D's right edge NaN + 30 = NaN.
    Toolbox: w = min(NaN, 30) - max(NaN, 0) = 30 - 0 = 30; h = min(100, 100) - max(0, 0)
    = 100; t = 3000; da = 30 * 100 = 3000 (x takes no part), ga = 3000; u = 3000 + 3000
    - 3000 = 3000; oa = 1 >= 0.5: a true positive, recall 1 at FPPI 0 -> LAMR 1e-10
    (numpy's minimum/maximum would give w = NaN, and the former 0: a false positive).
    City-scale script (``iou``: Python's builtin min(dx2, gx2) / max(dx1, gx1) keep the
    first argument, D's, when a comparison involves NaN): w = NaN - NaN = NaN, not
    ``<= 0``; h = 100; iou = NaN; its match test ``ious < iou`` is false for NaN, so D
    takes G: a true positive too, LAMR 0 (no clamp)."""
    scene = [{"gt": [_box(0, 0, 30, 100, 1.0)], "dt": [([math.nan, 0, 30, 100], 0.9)]}]
    toolbox = _row(_ours(tmp_path, scene), "reasonable")
    assert toolbox["detections"]["true_positive"] == 1
    assert toolbox["miss_rate"] == pytest.approx(1e-10, rel=1e-12)
    city = _row(_ours(tmp_path, scene, "miss-rate-cityscale"), "reasonable")
    assert city["detections"]["true_positive"] == 1
    assert city["miss_rate"] == 0.0
    _check_both(tmp_path, scene)


def test_an_endless_ignore_box_absorbs_by_matlab_min_max(tmp_path):
    """An ignore box R = [-Infinity, 0, Infinity, 480] (a ``people`` box, a neighbouring
    label; x + w = -inf + inf = NaN; a don't-care region so written is left unread) and
    detection D = [100, 0, 30, 100] (no box). Toolbox ``compOas`` with R ignored:
    w = min(130, NaN) - max(100, -Inf) = 130 - 100 = 30; h = min(100, 480) - max(0, 0)
    = 100; t = 3000; u = da = 3000; oa = 1 >= 0.5: D is ignored, not a false positive.
    The city-scale script keeps D's corners first (130, 100): the same 30 and 100, so D
    is ignored there too. Numpy's propagation (w = NaN) would have scored 0 before:
    D a false positive. A counted box G elsewhere, found at 0.9, keeps LAMR defined:
    with D ignored, recall 1 at FPPI 0 (LAMR 1e-10 / 0); were D an FP scored above G,
    only FPPI 1 reaches recall 1."""
    scene = [
        {
            "gt": [_box(300, 0, 30, 100, 1.0), _box(-math.inf, 0, math.inf, 480, cls="people")],
            "dt": [([100, 0, 30, 100], 0.95), ([300, 0, 30, 100], 0.9)],
        }
    ]
    for protocol, lamr in (("miss-rate", 1e-10), ("miss-rate-cityscale", 0.0)):
        row = _row(_ours(tmp_path, scene, protocol), "reasonable")
        assert row["detections"]["ignored"] == 1, protocol
        assert row["detections"]["false_positive"] == 0, protocol
        assert row["miss_rate"] == pytest.approx(lamr, rel=1e-12), protocol
    _check_both(tmp_path, scene)
