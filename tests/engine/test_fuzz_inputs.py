"""No input makes the CLI print a traceback or non-JSON (hypothesis property tests).

Random bytes and random JSON shapes — from arbitrary values to near-valid files with
wrong types, missing keys, huge integers, odd floats — go to both loaders (COCO-style
JSON and CSV) through the CLI's ``main()``, in process. Each run must end with exit 2
and an ``error: <file>: ...`` message, or (when the random file happens to be valid)
exit 0 with strict JSON (RFC 8259: no NaN/Infinity) on stdout. Any other exception
fails the test with its traceback.
"""

import contextlib
import io
import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine.__main__ import main

FAST = settings(
    max_examples=120,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)

TRUTH = {
    "images": [{"id": 1, "width": 640, "height": 480}, {"id": 2}],
    "annotations": [
        {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 50, 80], "iscrowd": 0},
        {"id": 2, "image_id": 2, "category_id": 2, "bbox": [-5, 50, 200, 100]},
    ],
    "categories": [{"id": 1, "name": "pedestrian"}, {"id": 2, "name": "car"}],
}
DETECTIONS = [
    {"image_id": 1, "category_id": 1, "bbox": [12, 9, 50, 80], "score": 0.9},
    {"image_id": 2, "category_id": 2, "bbox": [0, 50, 180, 100], "score": 0.4},
]
IMAGES_CSV = "image_id,width,height,tags\nf1,1280,720,night\nf2,1280,720,\n"
BOXES_CSV = "image_id,label,x_min,y_min,x_max,y_max\nf1,pedestrian,10,10,50,90\nf2,car,1,2,30,40\n"
PREDICTIONS_CSV = "image_id,label,x_min,y_min,x_max,y_max,score\nf1,pedestrian,10,10,50,90,0.8\n"

numbers = st.one_of(
    st.integers(-(2**70), 2**70),
    st.floats(allow_nan=False, allow_infinity=False),
    st.sampled_from([0, -1, 1e308, -0.0, 2**63, 2**64, 0.5]),
)
scalars = st.one_of(st.none(), st.booleans(), numbers, st.text(max_size=8))
values = st.recursive(
    scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=5), st.dictionaries(st.text(max_size=6), inner, max_size=5)
    ),
    max_leaves=20,
)


def _mutate(draw, record):
    """Replace, delete or add one key of a record."""
    record = dict(record)
    action = draw(st.sampled_from(["replace", "delete", "add", "box"]))
    key = draw(st.sampled_from(sorted(record)))
    if action == "replace":
        record[key] = draw(values)
    elif action == "delete":
        del record[key]
    elif action == "add":
        record[draw(st.text(max_size=6))] = draw(values)
    else:
        record["bbox"] = draw(st.lists(numbers, min_size=0, max_size=6))
    return record


@st.composite
def truth_shapes(draw):
    choice = draw(st.integers(0, 3))
    if choice == 0:
        return draw(values)
    data = json.loads(json.dumps(TRUTH))
    section = draw(st.sampled_from(["images", "annotations", "categories"]))
    if choice == 1:
        data[section] = draw(values)
    else:
        i = draw(st.integers(0, len(data[section]) - 1))
        data[section][i] = _mutate(draw, data[section][i])
    return data


@st.composite
def detection_shapes(draw):
    choice = draw(st.integers(0, 2))
    if choice == 0:
        return draw(values)
    dets = json.loads(json.dumps(DETECTIONS))
    i = draw(st.integers(0, len(dets) - 1))
    dets[i] = _mutate(draw, dets[i])
    return dets


def _run(argv):
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main(argv)
        except SystemExit as e:  # argparse
            code = e.code
    return code, out.getvalue(), err.getvalue()


def _check(code, out, err, names):
    if code == 0:
        json.loads(out, parse_constant=lambda c: pytest.fail(f"non-JSON constant {c}"))
        return
    assert code == 2, (code, err)
    assert err.startswith("error: ") and any(name in err for name in names), err
    assert "Traceback" not in err


@pytest.fixture
def write(tmp_path):
    def put(name, content):
        path = tmp_path / name
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content if isinstance(content, str) else json.dumps(content))
        return str(path)

    return put


def _score(*args):
    return ["score", *args, "--format", "json"]


@FAST
@given(data=st.binary(max_size=300), which=st.sampled_from(["truth", "predictions"]))
def test_random_bytes_as_json(write, data, which):
    truth = write("gt.json", data if which == "truth" else TRUTH)
    dt = write("dt.json", data if which == "predictions" else DETECTIONS)
    code, out, err = _run(_score("--truth", truth, "--predictions", dt))
    _check(code, out, err, ["gt.json", "dt.json"])


@FAST
@given(data=st.binary(max_size=300), which=st.sampled_from(["boxes", "images", "predictions"]))
def test_random_bytes_as_csv(write, data, which):
    boxes = write("boxes.csv", data if which == "boxes" else BOXES_CSV)
    images = write("images.csv", data if which == "images" else IMAGES_CSV)
    dt = write("dt.csv", data if which == "predictions" else PREDICTIONS_CSV)
    code, out, err = _run(_score("--truth", boxes, "--images", images, "--predictions", dt))
    _check(code, out, err, ["boxes.csv", "images.csv", "dt.csv"])


@FAST
@given(truth=truth_shapes(), boxes=st.sampled_from(["keep", "clip", "reject"]))
def test_random_truth_shapes(write, truth, boxes):
    gt = write("gt.json", truth)
    dt = write("dt.json", DETECTIONS)
    with np.errstate(all="warn"):  # the CLI runs under numpy's defaults
        code, out, err = _run(_score("--truth", gt, "--predictions", dt, "--boxes", boxes))
    _check(code, out, err, ["gt.json", "dt.json"])


@FAST
@given(dets=detection_shapes(), protocol=st.sampled_from(["coco", "voc07", "recall40"]))
def test_random_detection_shapes(write, dets, protocol):
    gt = write("gt.json", TRUTH)
    dt = write("dt.json", dets)
    with np.errstate(all="warn"):
        code, out, err = _run(_score("--truth", gt, "--predictions", dt, "--protocol", protocol))
    _check(code, out, err, ["dt.json"])


@FAST
@given(
    rows=st.lists(
        st.lists(st.one_of(st.text(max_size=6), numbers.map(str)), min_size=0, max_size=8),
        max_size=4,
    )
)
def test_random_csv_rows(write, rows):
    import csv

    text = io.StringIO()
    writer = csv.writer(text)
    writer.writerow(["image_id", "label", "x_min", "y_min", "x_max", "y_max", "score"])
    writer.writerows(rows)
    boxes = write("boxes.csv", BOXES_CSV)
    images = write("images.csv", IMAGES_CSV)
    dt = write("dt.csv", text.getvalue())
    with np.errstate(all="warn"):
        code, out, err = _run(_score("--truth", boxes, "--images", images, "--predictions", dt))
    _check(code, out, err, ["dt.csv"])
