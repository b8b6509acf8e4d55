"""Hand-worked examples from the published definitions, arithmetic written out.

Sources: PASCAL VOC — Everingham et al., "The PASCAL Visual Object Classes (VOC)
Challenge", IJCV 88(2), 2010, and the devkit's VOCevaldet.m / VOCap.m; 40 recall
positions — Simonelli et al., "Disentangling Monocular 3D Object Detection", ICCV 2019;
log-average miss rate — Dollár et al., "Pedestrian Detection: An Evaluation of the
State of the Art", TPAMI 34(4), 2012, and their toolbox's bbGt.m (compRoc) / dbEval.m.
"""

import math

import pytest

from evaluation.engine import evaluate, load_predictions, load_truth

IMAGES = "image_id,width,height,tags\nA,500,500,day\nB,500,500,night\n"

# Inclusive pixel boxes (x_min, y_min, x_max, y_max), VOC style.
# Image A: G1 [1,1,100,100], G2 [201,201,300,300]; image B: G3 [51,51,150,150].
TRUTH = """image_id,label,x_min,y_min,x_max,y_max,difficult
A,pedestrian,1,1,100,100,0
A,pedestrian,201,201,300,300,0
B,pedestrian,51,51,150,150,0
"""
DIFFICULT_BOX = "B,pedestrian,301,301,400,400,1\n"

# d1 0.9 on G1 -> TP; d2 0.8 overlaps G1 (taken) by 8100/11900 = 0.681 -> FP (duplicate);
# d3 0.7 in B hits nothing -> FP; d4 0.6 overlaps G3 by 95*95/(100*100) = 0.9025 -> TP;
# d5 0.5 on G2 -> TP.
PREDICTIONS = """image_id,label,x_min,y_min,x_max,y_max,score
A,pedestrian,1,1,100,100,0.9
A,pedestrian,11,11,110,110,0.8
B,pedestrian,301,301,400,400,0.7
B,pedestrian,56,56,150,150,0.6
A,pedestrian,201,201,300,300,0.5
"""


@pytest.fixture
def example(tmp_path):
    def build(difficult=False):
        (tmp_path / "images.csv").write_text(IMAGES)
        (tmp_path / "truth.csv").write_text(TRUTH + (DIFFICULT_BOX if difficult else ""))
        (tmp_path / "pred.csv").write_text(PREDICTIONS)
        truth = load_truth(tmp_path / "truth.csv", images=tmp_path / "images.csv")
        return truth, load_predictions(tmp_path / "pred.csv", truth)

    return build


def _ap(example, protocol, difficult=False):
    truth, predictions = example(difficult)
    return evaluate(truth, predictions, protocol)["per_class"]["pedestrian"]["AP"]


def test_voc07_eleven_point_ap(example):
    # Recall 1/3 1/3 1/3 2/3 1, precision 1 1/2 1/3 1/2 3/5; envelope 1 .6 .6 .6 .6.
    # t = 0, .1, .2, .3 -> 1 (4 points); t = .4 ... 1.0 -> 0.6 (7 points): 8.2 / 11.
    assert _ap(example, "voc07") == pytest.approx(8.2 / 11, abs=1e-12)  # 0.745455


def test_voc_all_point_ap(example):
    # Recall steps 1/3 at precision 1, 1/3 at .6, 1/3 at .6: 1/3 + 0.2 + 0.2.
    assert _ap(example, "voc") == pytest.approx(1 / 3 + 0.4, abs=1e-12)  # 0.733333


def test_difficult_box_is_neither_tp_nor_fp(example):
    # d3 now hits a difficult box and is ignored: recall 1/3 1/3 2/3 1 at precision
    # 1 1/2 2/3 3/4; envelope 1 .75 .75 .75; n_pos stays 3.
    # 11-point: (4 * 1 + 7 * 0.75) / 11 = 9.25 / 11; all-point: 1/3 + (2/3) * 0.75.
    assert _ap(example, "voc07", difficult=True) == pytest.approx(9.25 / 11, abs=1e-12)
    assert _ap(example, "voc", difficult=True) == pytest.approx(1 / 3 + 0.5, abs=1e-12)


def test_forty_recall_positions(example):
    # r = 1/40 ... 13/40 reach the first TP (precision 1); r = 14/40 ... 40/40 are
    # served by the envelope 0.6: (13 * 1 + 27 * 0.6) / 40 = 29.2 / 40 = 0.73.
    assert _ap(example, "recall40") == pytest.approx(0.73, abs=1e-12)
    # With the difficult box: (13 * 1 + 27 * 0.75) / 40 = 33.25 / 40.
    assert _ap(example, "recall40", difficult=True) == pytest.approx(33.25 / 40, abs=1e-12)


def test_forty_points_leave_out_recall_zero(example):
    """Simonelli et al.: r = 0 is not sampled, so one lucky top detection earns 1/40 at
    most, where 11 points starting at 0 grant it 1/11."""
    truth, _ = example()
    path = truth.source.replace("truth.csv", "one.csv")
    with open(path, "w") as f:
        f.write("image_id,label,x_min,y_min,x_max,y_max,score\nA,pedestrian,1,1,100,100,0.9\n")
    one = load_predictions(path, truth)
    per_class = evaluate(truth, one, "recall40")["per_class"]["pedestrian"]
    # Recall 1/3 at precision 1: positions 1/40 ... 13/40 -> 13 / 40.
    assert per_class["AP"] == pytest.approx(13 / 40, abs=1e-12)


def test_vehicle_classes_need_iou_07_under_recall40(tmp_path):
    """Common practice for road scenes: IoU 0.7 for cars, 0.5 for pedestrians."""
    (tmp_path / "images.csv").write_text("image_id,width,height\n1,300,300\n")
    (tmp_path / "truth.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max\n1,car,0,0,100,100\n1,pedestrian,150,0,250,100\n"
    )
    # Both detections cover 60 % of their box: IoU 6000 / 10000 = 0.6.
    (tmp_path / "pred.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max,score\n"
        "1,car,0,0,100,60,0.9\n1,pedestrian,150,0,250,60,0.9\n"
    )
    truth = load_truth(tmp_path / "truth.csv", images=tmp_path / "images.csv")
    result = evaluate(truth, load_predictions(tmp_path / "pred.csv", truth), "recall40")
    assert result["per_class"]["car"]["AP"] == 0.0
    assert result["per_class"]["car"]["iou_threshold"] == 0.7
    assert result["per_class"]["pedestrian"]["AP"] == 1.0


def test_log_average_miss_rate(tmp_path):
    """Eight images, four pedestrians; ranked detections TP FP TP FP FP TP."""
    images = "image_id,width,height\n" + "".join(f"{i},100,100\n" for i in range(1, 9))
    (tmp_path / "images.csv").write_text(images)
    (tmp_path / "truth.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max\n"
        + "".join(f"{i},pedestrian,10,10,50,90\n" for i in (1, 2, 3, 4))
    )
    rows = [
        (1, 0.9, True),
        (5, 0.8, False),
        (2, 0.7, True),
        (6, 0.6, False),
        (7, 0.5, False),
        (3, 0.4, True),
    ]
    (tmp_path / "pred.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max,score\n"
        + "".join(
            f"{i},pedestrian,{10 if hit else 60},10,{50 if hit else 90},90,{s}\n"
            for i, s, hit in rows
        )
    )
    truth = load_truth(tmp_path / "truth.csv", images=tmp_path / "images.csv")
    result = evaluate(truth, load_predictions(tmp_path / "pred.csv", truth), "coco")
    # After each detection: FPPI = FP / 8 = 0 .125 .125 .25 .375 .375,
    # miss rate = 1 - TP / 4 = .75 .75 .5 .5 .5 .25.
    # References f = 10^(-2 + k/4): .01 .018 .032 .056 .1 -> MR .75 (only FPPI 0 fits);
    # .178 -> last point with FPPI <= f is the 3rd -> .5; .316 -> the 4th -> .5;
    # .562 and 1 -> the 6th -> .25.
    expected = math.exp((5 * math.log(0.75) + 2 * math.log(0.5) + 2 * math.log(0.25)) / 9)
    assert result["per_class"]["pedestrian"]["miss_rate"] == pytest.approx(expected, abs=1e-12)
    assert expected == pytest.approx(0.5369, abs=1e-4)


def _score_csv(tmp_path, images, truth_rows, prediction_rows, protocol):
    (tmp_path / "images.csv").write_text(
        "image_id,width,height\n" + "".join(f"{i},1000,1000\n" for i in images)
    )
    (tmp_path / "truth.csv").write_text("image_id,label,x_min,y_min,x_max,y_max\n" + truth_rows)
    (tmp_path / "pred.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max,score\n" + prediction_rows
    )
    truth = load_truth(tmp_path / "truth.csv", images=tmp_path / "images.csv")
    predictions = load_predictions(tmp_path / "pred.csv", truth)
    return evaluate(truth, predictions, protocol)["per_class"]["pedestrian"]


def test_voc07_samples_recall_at_the_devkits_floating_point_thresholds(tmp_path):
    """10 ground-truth boxes; detections TP, TP, TP, then 7 FP, then TP (VOC2007
    devkit ``VOCevaldet.m``: ``for t=0:0.1:1``, whose 4th value is 0.30000000000000004).

    Recall after each: .1 .2 .3 (x8) .4; precision 1 1 1 3/4 ... 3/10 4/11.
    t = 0, .1, .2 -> max precision at recall >= t = 1 (3 points);
    t = 0.30000000000000004 -> recall 0.3 (= 3/10 exactly) does not reach it; only the
    last point (recall .4, precision 4/11) does -> 4/11; t = .4 -> 4/11; t >= .5 -> 0.
    AP = (3 + 2 * 4/11) / 11 = 41/121 = 0.338843 (the devkit's number; exact k/10
    thresholds would give (4 + 4/11) / 11 = 48/121 = 0.396694)."""
    truth = "".join(f"1,pedestrian,{100 * i},0,{100 * i + 49},49\n" for i in range(10))
    rows, score = [], 1.0
    hits = [0, 1, 2, None, None, None, None, None, None, None, 3]
    for hit in hits:
        score -= 0.05
        x = 100 * hit if hit is not None else 20
        y = 0 if hit is not None else 500
        rows.append(f"1,pedestrian,{x},{y},{x + 49},{y + 49},{score:.2f}\n")
    row = _score_csv(tmp_path, [1], truth, "".join(rows), "voc07")
    assert (row["tp"], row["fp"]) == (4.0, 7.0)
    assert row["AP"] == pytest.approx(41 / 121, abs=1e-12)
    assert round(row["AP"], 6) == 0.338843


def test_voc_ties_keep_file_order(tmp_path):
    """Devkit ``VOCevaldet.m`` sorts a class's whole results file with MATLAB's stable
    sort: tied detections keep file order, not image order. Images 1 and 2, one box
    each. File: FP on image 2 (0.8), TP on image 1 (0.8), TP on image 2 (0.7).

    File order: recall .5 at precision 1/2, recall 1 at 2/3; envelope 2/3, 2/3:
    all-point AP = .5 * 2/3 + .5 * 2/3 = 2/3. (Image order would put the TP first:
    .5 * 1 + .5 * 2/3 = 5/6.)"""
    truth = "1,pedestrian,0,0,99,99\n2,pedestrian,0,0,99,99\n"
    rows = (
        "2,pedestrian,500,500,599,599,0.8\n1,pedestrian,0,0,99,99,0.8\n2,pedestrian,0,0,99,99,0.7\n"
    )
    assert _score_csv(tmp_path, [1, 2], truth, rows, "voc")["AP"] == pytest.approx(2 / 3)
    image_order = {"name": "voc-image-ties", "base": "voc", "tie_order": "image"}
    from evaluation.engine import protocol_from_dict

    custom = protocol_from_dict(image_order)
    assert _score_csv(tmp_path, [1, 2], truth, rows, custom)["AP"] == pytest.approx(5 / 6)


@pytest.mark.parametrize(
    "order, expected",
    [
        # TP then FP: recall 1 at FPPI 0 -> miss rate 0 at all nine points, clamped.
        ("tp_first", 1e-10),
        # FP then TP: the first point is (FPPI 1, recall 0); only f = 1 reaches the second
        # point (recall 1): miss rates 1 (8 times) and 1e-10 -> exp(ln(1e-10) / 9).
        ("fp_first", math.exp(math.log(1e-10) / 9)),
    ],
)
def test_miss_rate_with_tied_scores_reads_every_detection(tmp_path, order, expected):
    """Dollár et al.'s toolbox (``bbGt`` ``compRoc``, ``dbEval``): one image, one box;
    a TP and an FP tied at 0.9. The curve has a point after every detection in stable
    order, so the order within the tie counts (0.0774 would be the value of a curve
    read only between distinct scores, for either order)."""
    truth = "1,pedestrian,10,10,50,90\n"
    tp_row, fp_row = "1,pedestrian,10,10,50,90,0.9\n", "1,pedestrian,300,300,340,380,0.9\n"
    rows = tp_row + fp_row if order == "tp_first" else fp_row + tp_row
    row = _score_csv(tmp_path, [1], truth, rows, "coco")
    assert row["miss_rate"] == pytest.approx(expected, rel=1e-12)
    if order == "fp_first":
        assert round(row["miss_rate"], 4) == 0.0774


def test_operating_point_and_best_f1(example):
    truth, predictions = example()
    row = evaluate(truth, predictions, "voc", score_threshold=0.65)["per_class"]["pedestrian"]
    # Scores >= 0.65 keep d1 (TP), d2 (FP), d3 (FP): P = 1/3, R = 1/3, F1 = 2/(3 + 3).
    assert row["at_threshold"]["precision"] == pytest.approx(1 / 3)
    assert row["at_threshold"]["recall"] == pytest.approx(1 / 3)
    assert row["at_threshold"]["f1"] == pytest.approx(1 / 3)
    # Cuts: after d1 F1 = 2/4; d2 2/5; d3 2/6; d4 4/7; d5 6/8 = 0.75 -> threshold 0.5.
    assert row["best_f1"] == {"threshold": 0.5, "f1": 0.75, "precision": 0.6, "recall": 1.0}


def test_tag_slice_scores_only_tagged_images(example):
    truth, predictions = example()
    tags = evaluate(truth, predictions, "voc")["slices"]["tag"]
    # Night = image B: G3 with d3 (FP, 0.7) then d4 (TP, 0.6): precision 1/2 at recall 1.
    assert tags["night"]["images"] == 1
    assert tags["night"]["per_class"]["pedestrian"] == pytest.approx(0.5)
    # Day = image A: d1 TP, d2 FP, d5 TP: recall 1/2 at 1, 1 at 2/3 -> 0.5 + 0.5 * 2/3.
    assert tags["day"]["per_class"]["pedestrian"] == pytest.approx(0.5 + 1 / 3)
