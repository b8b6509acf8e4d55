"""Non-finite detection boxes under the miss-rate and KITTI protocols: no floating-point
warning (``conftest`` turns each into an error; the CLI printed numpy's
``RuntimeWarning: invalid value encountered in add`` with its source line for
``[Infinity, 10, -Infinity, 30]``), and the numbers equal the transliterations
(``pedestrian_oracle``: the pedestrian toolbox and the city-scale code, in Python floats,
whose ``inf + -inf`` is NaN without an error as in MATLAB/C doubles; kitti2d, whose label
reader takes no ``inf``, on the command line only, its numbers unchanged by the quiet
arithmetic: ``test_difficulty.py`` against the devkit transliteration). Python's json reads ``Infinity``
(json module documentation), so such a file is one pycocotools 2.0.11 scores."""

import contextlib
import io
import json
import math
import warnings

import numpy as np
import pytest

from evaluation.engine.__main__ import main

from .test_pedestrian import _box, _check_both

INF = math.inf
_ODD = [(INF, 10, -INF, 30), (10, INF, 40, -INF), (1e308, 1e308, 1e308, 1e308), (5, 5, 0, 0)]
#: Corners that are NaN while the other side is finite: the toolbox's MATLAB ``min``/
#: ``max`` omit NaN (MathWorks documentation), the engine's ``np.minimum`` and the
#: oracle's Python ``min`` (order-dependent) do not, so no oracle holds MATLAB's numbers
#: here (left open); these are checked for warnings only.
_NAN_CORNERS = [(-INF, 50, INF, 120), (float("nan"), 20, 30, 80)]


@pytest.mark.parametrize("odd", _ODD)
def test_miss_rate_protocols_quiet_and_equal_to_the_toolbox(tmp_path, odd):
    """miss-rate, miss-rate-caltech (aspect standardised: ``d = h*ar - w`` on inf),
    miss-rate-cityscale: equal to ``pedestrian_oracle``, no warning."""
    scene = [
        {
            "gt": [_box(100, 100, 40, 100, vis=1.0), _box(300, 100, 40, 90, vis=0.9)],
            "regions": [(400, 50, 100, 200)],
            "dt": [(odd, 0.95), ((101, 102, 40, 98), 0.9), ((300, 100, 41, 90), 0.4)],
        },
        {"gt": [_box(50, 60, 30, 80, vis=1.0)], "dt": [(odd, 0.7), ((50, 60, 30, 80), 0.6)]},
    ]
    _check_both(tmp_path, scene)


@pytest.mark.parametrize("odd", _NAN_CORNERS)
def test_nan_corners_raise_no_warning(tmp_path, odd):
    from .test_pedestrian import _ours

    scene = [
        {"gt": [_box(100, 100, 40, 100, vis=1.0)], "dt": [(odd, 0.9), ((100, 100, 40, 99), 0.5)]}
    ]
    for protocol in ("miss-rate", "miss-rate-caltech", "miss-rate-cityscale"):
        _ours(tmp_path, scene, protocol)  # conftest: any floating-point warning raises


def test_the_audits_file_on_the_command_line(tmp_path):
    """audit4 F7's file: no warning on stderr under any of the four protocols, exit 0."""
    gt, dt = tmp_path / "gt.json", tmp_path / "dt.json"
    gt.write_text(
        '{"images":[{"id":1,"width":100,"height":100}],"categories":[{"id":1,"name":"a"}],'
        '"annotations":[{"id":1,"image_id":1,"category_id":1,"bbox":[10,10,30,30],'
        '"area":900,"iscrowd":0}]}'
    )
    dt.write_text(
        '[{"image_id":1,"category_id":1,"bbox":[Infinity,10,-Infinity,30],"score":0.9},'
        '{"image_id":1,"category_id":1,"bbox":[10,10,30,30],"score":0.5}]'
    )
    for protocol in ("miss-rate", "miss-rate-caltech", "miss-rate-cityscale", "kitti2d"):
        err = io.StringIO()
        with (
            warnings.catch_warnings(record=True) as caught,
            contextlib.redirect_stderr(err),
            contextlib.redirect_stdout(io.StringIO()),
            np.errstate(all="warn"),  # as the command runs: numpy's default is "warn"
        ):
            warnings.simplefilter("always")
            code = main(["score", "--truth", str(gt), "--predictions", str(dt),
                         "--protocol", protocol, "--format", "json"])  # fmt: skip
        assert code == 0, (protocol, err.getvalue())
        assert not caught and not err.getvalue(), protocol


def test_huge_finite_corners_under_kitti2d(tmp_path):
    """red team audit14 F4: finite corners whose width overflows (``-1e308 .. 1e308``,
    kept as read since engine 2.23.0) made ``difficulty._overlap`` warn on stderr; the
    devkit's C doubles overflow to inf quietly (IEEE 754, common practice), and the
    numbers are those of a false positive of the same height and score beside the box:
    the huge box's overlap with every box is 0 there (an infinite union), as in the
    devkit transliteration's arithmetic (``test_difficulty.py``)."""
    (tmp_path / "images.csv").write_text("image_id,width,height\n1,100,80\n")
    (tmp_path / "truth.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max\n1,Car,10,10,50,60\n"
    )
    rows = "image_id,label,x_min,y_min,x_max,y_max,score\n1,Car,10,10,50,60,0.8\n"
    (tmp_path / "beside.csv").write_text(rows + "1,Car,60,0,90,70,0.9\n")
    (tmp_path / "huge.csv").write_text(rows + "1,Car,-1e308,0,1e308,70,0.9\n")
    outputs = {}
    for name in ("beside", "huge"):
        err, out = io.StringIO(), io.StringIO()
        with (
            warnings.catch_warnings(record=True) as caught,
            contextlib.redirect_stderr(err),
            contextlib.redirect_stdout(out),
            np.errstate(all="warn"),  # as the command runs
        ):
            warnings.simplefilter("always")
            code = main(["score", "--truth", str(tmp_path / "truth.csv"),
                         "--images", str(tmp_path / "images.csv"),
                         "--predictions", str(tmp_path / f"{name}.csv"),
                         "--protocol", "kitti2d", "--format", "json"])  # fmt: skip
        assert code == 0 and not caught and not err.getvalue(), (name, err.getvalue())
        outputs[name] = json.loads(out.getvalue())
    for level in ("easy", "moderate", "hard"):
        beside, huge = (outputs[n]["levels"][level] for n in ("beside", "huge"))
        assert huge == beside, level
