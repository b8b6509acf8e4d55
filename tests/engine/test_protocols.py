"""Protocol presets and custom presets."""

import numpy as np
import pytest

from evaluation.engine import PRESETS, InputError, protocol_from_dict
from evaluation.engine.protocols import VOC07_RECALL_POINTS, matlab_colon

from . import oracle


def test_coco_thresholds_are_numpys_linspace_exactly():
    """pycocotools selects AP50/AP75 by equality with linspace values (from its source)."""
    assert PRESETS["coco"].iou_thresholds == tuple(np.linspace(0.5, 0.95, 10).tolist())
    assert PRESETS["coco"].recall_points == tuple(np.linspace(0, 1, 101).tolist())


def test_voc07_points_are_matlabs_colon_as_matlab_prints_it():
    """The devkit's ``for t=0:0.1:1`` (VOC2007 ``VOCevaldet.m``) as MATLAB makes it.

    Outside source: the blog post "Fun with linspace and the colon operator" (13 March
    2009) prints MATLAB's own comparisons of ``x = 0:0.1:1`` with
    ``y = linspace(0,1,11)``, with ``a = (0:10)*0.1`` and with ``b`` built by adding
    0.1 ten times: ``x == y`` is 1 1 1 0 1 1 1 1 1 1 1 (``x - y`` = 0.5551e-16 at the
    4th), ``a == x`` is 1 1 1 1 1 1 0 0 1 1 1, ``b == x`` is 1 1 1 1 1 1 1 1 0 0 0.
    MATLAB's ``linspace`` here is k/10 correctly rounded, which Python's k / 10 is.
    The algorithm itself (first half from the left, second half from the right) is
    MathWorks' documented one (``protocols.matlab_colon``)."""
    x = VOC07_RECALL_POINTS
    y = [k / 10 for k in range(11)]
    a = [k * 0.1 for k in range(11)]
    b = [0.0]
    for _ in range(10):
        b.append(b[-1] + 0.1)
    assert [int(p == q) for p, q in zip(x, y)] == [1, 1, 1, 0, 1, 1, 1, 1, 1, 1, 1]
    assert x[3] - y[3] == pytest.approx(0.5551e-16, abs=1e-20)
    assert [int(p == q) for p, q in zip(a, x)] == [1, 1, 1, 1, 1, 1, 0, 0, 1, 1, 1]
    assert [int(p == q) for p, q in zip(b, x)] == [1, 1, 1, 1, 1, 1, 1, 1, 0, 0, 0]
    assert x[3] == 0.30000000000000004 and x[3] > 0.3  # why recall 0.3 misses the 4th
    assert x == tuple(oracle.matlab_colon(0, 0.1, 1)) == matlab_colon(0, 0.1, 1)
    # The toolbox's FPPI references 10.^(-2:.25:0): exact steps, so any form agrees.
    assert matlab_colon(-2, 0.25, 0) == tuple(np.linspace(-2, 0, 9).tolist())


def test_recall40_points_leave_out_zero():
    points = PRESETS["recall40"].recall_points
    assert len(points) == 40 and points[0] == 1 / 40 and points[-1] == 1.0


def test_per_class_thresholds():
    table = PRESETS["recall40"].threshold_table(("car", "pedestrian", "bus"))
    assert table.tolist() == [[0.7, 0.5, 0.7]]


def test_per_class_thresholds_match_case_insensitively():
    """`Car` is a car (0.7 under recall40, common practice for vehicles), not 0.5."""
    table = PRESETS["recall40"].threshold_table(("Car", "Pedestrian", "BUS"))
    assert table.tolist() == [[0.7, 0.5, 0.7]]


def test_custom_thresholds_must_name_classes_of_the_split():
    """A preset may name classes the split lacks (van, truck); a custom protocol's own
    names are checked against the split, with the split's classes listed."""
    custom = protocol_from_dict({"name": "x", "class_iou_thresholds": {"Car": 0.7, "tram": 0.6}})
    assert custom.threshold_table(("car", "tram")).tolist()[0] == [0.7, 0.6]
    with pytest.raises(
        InputError,
        match=r"protocol x: field 'class_iou_thresholds': 'tram' is not a class of the split "
        r"\(classes: car, pedestrian\)",
    ):
        custom.threshold_table(("car", "pedestrian"))
    with pytest.raises(InputError, match=r"names a class twice"):
        protocol_from_dict({"name": "y", "class_iou_thresholds": {"car": 0.7, "CAR": 0.5}})


@pytest.mark.parametrize(
    "spec, pattern",
    [
        ({"iou_thresholds": [0.5]}, r"field 'name': a custom protocol needs a non-empty name"),
        (
            {"name": "x", "iou_thresholds": [1.5]},
            r"field 'iou_thresholds': item 0 = 1.5 is outside",
        ),
        ({"name": "x", "iou_thresholds": []}, r"field 'iou_thresholds': must be a non-empty list"),
        ({"name": "x", "recall_points": [0.5, 0.1]}, r"field 'recall_points': must be ascending"),
        ({"name": "x", "matching": "hungarian"}, r"field 'matching': must be 'greedy' or"),
        ({"name": "x", "class_iou_thresholds": {"car": 2}}, r"IoU for 'car' must be in \[0, 1\]"),
        ({"name": "x", "colour": "red"}, r"field 'colour': unknown key"),
        ({"name": "x", "base": "yolo"}, r"field 'base': must be a preset \(coco, .*got 'yolo'"),
        ({"name": "x", "tie_order": "score"}, r"field 'tie_order': must be one of image, file"),
        ({"name": "x", "max_detections": 0}, r"field 'max_detections': must be a positive integer"),
        # red team audit12 F1: an integer beyond float64 (1e400 written out) raised
        # OverflowError in math.isfinite (exit 1 on the CLI, HTTP 500 on the API)
        ({"name": "x", "iou_thresholds": [10**400]}, r"field 'iou_thresholds': item 0 = 1000"),
        ({"name": "x", "recall_points": [0, 10**400]}, r"field 'recall_points': item 1 = 1000"),
        ({"name": "x", "area_ranges": [["all", 0, 10**400]]}, r"field 'area_ranges\[0\]'"),
        (
            {"name": "x", "area_ranges": [["all", 0, 9], ["s", -(10**400), 4]]},
            r"'area_ranges\[1\]'",
        ),
        ({"name": "x", "class_iou_thresholds": {"car": 10**400}}, r"IoU for 'car' must be in"),
        # audit12 F9: booleans are not numbers here; a version must fit the platform's column
        ({"name": "x", "version": True}, r"field 'version': must be a whole number from 1"),
        ({"name": "x", "version": 2**31}, r"field 'version': must be a whole number from 1"),
        ({"name": "x", "pixel_offset": True}, r"field 'pixel_offset': must be 0 or 1"),
    ],
)
def test_custom_protocol_errors_name_the_field(spec, pattern):
    with pytest.raises(InputError, match=pattern):
        protocol_from_dict(spec)


@pytest.mark.parametrize(
    "name", ["coco", "voc", "voc07", "recall40", "kitti2d", "miss-rate", "miss-rate-cityscale"]
)
def test_a_custom_protocol_may_not_take_a_presets_name(name):
    """A result records its protocol by name and version: a custom protocol named
    ``coco`` would read as the preset in its record and in ``explain``, with other
    numbers. Matching and level presets' names alike are refused, naming ``name``."""
    with pytest.raises(InputError, match=rf"field 'name': '{name}' is a preset's name"):
        protocol_from_dict({"name": name, "base": "coco"})
    shouted = name.upper()  # audit12 F9: a suite could list both `coco` and `COCO`
    with pytest.raises(InputError, match=rf"field 'name': '{shouted}' is a preset's name"):
        protocol_from_dict({"name": shouted, "base": "coco"})
    # a name that merely contains a preset's is a name of its own
    assert protocol_from_dict({"name": f"{name}-night"}).name == f"{name}-night"


def test_custom_protocol_inherits_from_its_base():
    p = protocol_from_dict({"name": "voc-strict", "base": "voc", "iou_thresholds": [0.7]})
    assert (p.matching, p.pixel_offset, p.recall_points) == ("best_overlap", 1.0, None)
    assert p.iou_thresholds == (0.7,)
