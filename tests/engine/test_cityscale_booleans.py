"""Boolean scores under ``miss-rate-cityscale``: refused exactly where the CityPersons
script raises, scored as it scores them elsewhere (``loaders.cityscale_booleans``).

Source: the published ``eval_MR_multisetup.py`` (cvgroup-njust/CityPersons), its logic
transliterated in ``pedestrian_oracle.cityscale_coco`` and run per setup 0..3 as
``eval_demo.py`` does (``pedestrian_oracle.cityscale_script``): ``evaluateImg`` keeps an
image's first 1,000 detections by score, then drops those outside the setup's expanded
height range, and builds ``dtScores`` from the rest; ``accumulate`` (category id 1
only) joins the lists of the images with an annotation or a detection of the category
and negates them, where numpy raises TypeError on a boolean array (numpy's message
"The numpy boolean negative, the `-` operator, is not supported").
"""

import subprocess
import sys

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth, shards
from evaluation.engine.loaders import cityscale_booleans, results_stream
from evaluation.engine.pedestrian import evaluate_setups
from evaluation.engine.pieces import stream_pieces

from .test_cityscale_raises import SETUPS, _ann, _dataset, _det, _script, _write


def _raises_on_booleans(reference):
    return isinstance(reference, TypeError) and "boolean negative" in str(reference)


def _ours(gt, dt):
    truth = load_truth(gt)
    return evaluate_setups(truth, load_predictions(dt, truth), "miss-rate-cityscale")


def _agree(gt, dt, results, record=None):
    """Ours equals the script: refused where it raises (on the booleans: naming the
    detections file, a boolean-scored record and ``score``; else the ground truth),
    the same four setups elsewhere. Returns the error or the output."""
    reference = _script(gt, dt)
    if isinstance(reference, Exception):
        with pytest.raises(InputError) as e:
            _ours(gt, dt)
        if _raises_on_booleans(reference):
            assert e.value.field == "score" and str(dt) in str(e.value), str(e.value)
            at = int(e.value.record.split()[1])
            assert type(results[at]["score"]) is bool
            if record is not None:
                assert e.value.record == record
        else:
            assert e.value.field != "score" and str(gt) in str(e.value), str(e.value)
        return e.value
    ours = _ours(gt, dt)
    for setup, (mean_s, mrs) in zip(SETUPS, reference):
        level = ours["levels"][setup]
        if mrs is None:
            assert level["miss_rate"] is None, setup
        else:
            assert level["miss_rate"] == mean_s, setup
            assert level["classes"]["c1"]["reference_miss_rate"] == mrs, setup
    return ours


def _case(tmp_path, annotations, results, images=(1,), categories=(1,), marks=()):
    return _write(tmp_path, _dataset(annotations, images, categories), results, marks)


# Worked cases; what the script does is read off its transliteration's run, not assumed.
CASES = {
    # one image, its only detection true: raises in setup 0
    "lone true": ([_ann(1, 0.0)], [_det(0.0, score=True)], "reasonable"),
    # a number of height 30 is dropped by reasonable's filter (30 < 50 / 1.25): [True]
    "the number below the height filter": (
        [_ann(1, 0.0)],
        [_det(0.0, score=True), _det(300.0, h=30.0, score=0.5)],
        "reasonable",
    ),
    # the number kept: [True, 0.5] is float64
    "a number kept": ([_ann(1, 0.0)], [_det(0.0, score=True), _det(300.0, score=0.5)], None),
    # True and 1 in one list: int64
    "true beside 1": ([_ann(1, 0.0)], [_det(0.0, score=True), _det(300.0, score=1)], None),
    # image 2 has a box and its only detection (h 30) is kept by `all` alone: float64
    # empty lists join in before, booleans alone in `all`
    "kept on every image in all alone": (
        [_ann(1, 0.0), _ann(2, 0.0, h=30.0, image_id=2)],
        [_det(0.0, score=False), _det(0.0, h=30.0, score=True, image_id=2)],
        "all",
    ),
    # image 2 has a box and no detection: an empty float64 list in every setup
    "an image with a box only": (
        [_ann(1, 0.0), _ann(2, 0.0, image_id=2)],
        [_det(0.0, score=True)],
        None,
    ),
    # image 2 has a category-2 box only: not in E of category 1
    "another category's image": (
        [_ann(1, 0.0), _ann(2, 0.0, image_id=2, category_id=2)],
        [_det(0.0, score=True), _det(0.0, score=0.5, image_id=2, category_id=2)],
        "reasonable",
    ),
    # booleans in category 2 alone: accumulate reads category 1 only
    "category 2's booleans": (
        [_ann(1, 0.0), _ann(2, 0.0, category_id=2)],
        [_det(0.0, score=0.5), _det(0.0, score=True, category_id=2)],
        None,
    ),
    # a ground-truth value the script raises on in setup 0 comes first
    "a NaN ignore in the same setup": (
        [_ann(1, 0.0, ignore="@0"), _ann(2, 100.0)],
        [_det(0.0, score=True)],
        "ground truth",
    ),
    # a null vis_ratio on a box of height 30 is compared in `all` only: the booleans
    # raise in setup 0 first
    "a null vis_ratio in a later setup": (
        [_ann(1, 0.0), _ann(2, 100.0, h=30.0, vis_ratio=None)],
        [_det(0.0, score=True)],
        "reasonable",
    ),
}


@pytest.mark.parametrize("case", CASES)
def test_worked_cases_against_the_script(tmp_path, case):
    annotations, results, raised = CASES[case]
    images = sorted({a["image_id"] for a in annotations} | {1, 2})
    gt, dt = _case(tmp_path, annotations, results, images, (1, 2), ["NaN"])
    reference = _script(gt, dt)
    if raised is None:
        assert not isinstance(reference, Exception)
    elif raised == "ground truth":
        assert isinstance(reference, ValueError)
    else:
        assert _raises_on_booleans(reference)
    found = _agree(gt, dt, results)
    if raised not in (None, "ground truth"):
        assert f"in setup {raised!r}" in str(found)


def _capped(tmp_path, n_true, tail):
    """Image 1: one box, ``n_true`` detections scoring true, then ``tail``."""
    results = [_det(0.0, score=True) for _ in range(n_true)] + tail
    return _case(tmp_path, [_ann(1, 0.0)], results), results


@pytest.mark.parametrize("n_true, raises", [(1000, True), (999, False)])
def test_the_cap_of_1000_comes_before_the_join(tmp_path, n_true, raises):
    """A 0.5 ranked after ``n_true`` booleans: cut by the cap at 1,000 (booleans alone
    are joined) or kept (float64)."""
    (gt, dt), results = _capped(tmp_path, n_true, [_det(300.0, score=0.5)])
    assert _raises_on_booleans(_script(gt, dt)) is raises
    _agree(gt, dt, results, "record 0" if raises else None)


def test_the_cap_takes_the_scripts_exact_order(tmp_path):
    """One true and 1,000 integers near -2**62 that float64 ties: the script's order
    (exact int64) puts -2**62 - 1, written first and tall enough to be kept, last, so
    the cap cuts it and only the true survives the height filter (the others are 10 px
    high). float64's stable order would cut the last one written and keep it."""
    tail = [_det(300.0, score=-(2**62) - 1)]
    tail += [_det(500.0, h=10.0, score=-(2**62)) for _ in range(999)]
    (gt, dt), results = _capped(tmp_path, 1, tail)
    assert _raises_on_booleans(_script(gt, dt))
    _agree(gt, dt, results, "record 0")


def test_whole_streamed_cached_and_the_cli_agree(tmp_path, monkeypatch):
    """Read a block at a time into pieces (every piece carries the whole file's
    refusal: a shard of images would not see the others), through the cache, and the
    command line exits 2 naming file, record and field."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 256)
    annotations = [_ann(1, 0.0), _ann(2, 0.0, image_id=2), _ann(3, 0.0, image_id=3)]
    results = [_det(0.0, score=0.7, image_id=2, h=10.0), _det(0.0, score=False, image_id=2)]
    results += [_det(0.0, score=True, image_id=i) for i in (1, 3)]
    gt, dt = _case(tmp_path, annotations, results, images=(1, 2, 3))
    assert _raises_on_booleans(_script(gt, dt))
    _agree(gt, dt, results, "record 1")
    truth = load_truth(gt)
    whole = load_predictions(dt, truth).score_conflicts[cityscale_booleans.KEY]
    assert whole["setup"] == "reasonable"
    cached = [load_predictions(dt, truth, cache_dir=str(tmp_path / "c")) for _ in range(2)]
    assert all(c.score_conflicts[cityscale_booleans.KEY] == whole for c in cached)
    pieces_dir = tmp_path / "pieces"
    pieces_dir.mkdir()
    streamed = stream_pieces(dt, truth, shards.plan(truth.n_images, 1), str(pieces_dir))
    for path in streamed.paths:
        piece_truth, _, piece, _ = shards.load_piece(path)
        assert piece.score_conflicts[cityscale_booleans.KEY] == whole
        with pytest.raises(InputError, match="record 1"):
            evaluate_setups(piece_truth, piece, "miss-rate-cityscale")
    run = subprocess.run(
        [sys.executable, "-m", "evaluation.engine", "score", "--truth", str(gt),
         "--predictions", str(dt), "--protocol", "miss-rate-cityscale"],
        capture_output=True, text=True,
    )  # fmt: skip
    assert run.returncode == 2 and "Traceback" not in run.stderr
    assert "record 1" in run.stderr and "'score'" in run.stderr


def test_other_protocols_score_the_file(tmp_path):
    """The toolbox reads MATLAB doubles (no booleans): the same file is scored."""
    gt, dt = _case(tmp_path, [_ann(1, 0.0)], [_det(0.0, score=True)])
    truth = load_truth(gt)
    headline = evaluate_setups(truth, load_predictions(dt, truth), "miss-rate")["headline"]
    assert headline == pytest.approx(1e-10)  # every box found: the toolbox's 1e-10 floor


# --- random files against the transliteration ----------------------------------------

_SCORES = [True, False, True, 1, 0, 0.5, 1.0]


@st.composite
def _files(draw):
    annotations, marks = [], []
    for k in range(draw(st.integers(0, 5))):
        h = draw(st.sampled_from([10.0, 30.0, 60.0, 100.0]))
        ann = _ann(k + 1, k * 60.0, h=h, image_id=draw(st.sampled_from([1, 2, 3])))
        ann["category_id"] = draw(st.sampled_from([1, 1, 1, 2]))
        ann["ignore"] = f"@{len(marks)}"
        marks.append(draw(st.sampled_from(["0", "1", "0", "NaN"])))
        annotations.append(ann)
    results = [
        _det(
            draw(st.sampled_from([0.0, 60.0, 500.0])),
            h=draw(st.sampled_from([10.0, 30.0, 60.0, 100.0])),
            image_id=draw(st.sampled_from([1, 2, 3])),
            category_id=draw(st.sampled_from([1, 1, 1, 2])),
            score=draw(st.sampled_from(_SCORES)),
        )
        for _ in range(draw(st.integers(1, 6)))
    ]
    return _dataset(annotations, images=(1, 2, 3), categories=(1, 2)), results, marks


@settings(
    max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(files=_files())
def test_random_files_raise_and_score_as_the_script(tmp_path, files):
    """Booleans beside 1, 0, 0.5, heights on either side of each setup's filter, images
    with and without boxes or detections of either category, and NaN ignores (the
    script's ground-truth raise, which comes first within a setup)."""
    dataset, results, marks = files
    _agree(*_write(tmp_path, dataset, results, marks), results)
