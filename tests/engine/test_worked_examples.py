"""Hand-worked examples from the published definitions, arithmetic written out.

Sources: PASCAL VOC — Everingham et al., "The PASCAL Visual Object Classes (VOC)
Challenge", IJCV 88(2), 2010, and the devkit's VOCevaldet.m / VOCap.m; 40 recall
positions — Simonelli et al., "Disentangling Monocular 3D Object Detection", ICCV 2019;
log-average miss rate — Dollár et al., "Pedestrian Detection: An Evaluation of the
State of the Art", TPAMI 34(4), 2012.
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
