"""``miss-rate-cityscale`` refuses a ground-truth value exactly where the CityPersons
script ``eval_MR_multisetup.py`` raises on it, and scores it as the script does elsewhere
(``evaluation.engine.cityscale_raises``).

Source (cvgroup-njust/CityPersons, read from the published code; transliterated in
``pedestrian_oracle.cityscale_coco``, run per setup 0..3 as ``eval_demo.py`` does by
``pedestrian_oracle.cityscale_script``):

* ``_prepare``: ``gt['ignore'] = 1 if (gt['height'] < HtRng[id_setup][0] or
  gt['height'] > HtRng[id_setup][1]) or (gt['vis_ratio'] < VisRng[id_setup][0] or ...)
  else gt['ignore']`` over ``getAnnIds(imgIds, catIds)``: Python's ``or`` stops at the
  first true test (common practice: the language's definition), so a null / text /
  array ``vis_ratio`` raises TypeError only where the height test lets the box through.
* ``computeIoU`` (called by ``evaluateImg`` only when a detection of the image and
  category is left after ``maxDets`` and the expanded height filter): ``iscrowd =
  [int(o['ignore']) for o in gt]``; ``int`` raises on NaN and unreadable text
  (ValueError), an infinity (OverflowError), null, arrays and objects (TypeError).
"""

import json
import subprocess
import sys

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.pedestrian import evaluate_setups

from . import pedestrian_oracle

SETUPS = ("reasonable", "small", "heavy", "all")


def _ann(ann_id, x, h=100.0, image_id=1, category_id=1, **keys):
    return {
        "id": ann_id,
        "image_id": image_id,
        "category_id": category_id,
        "bbox": [x, 0.0, 0.41 * h, h],
        "height": h,
        "vis_ratio": 1.0,
        "ignore": 0,
        **keys,
    }


def _det(x, h=100.0, score=0.9, image_id=1, category_id=1):
    return {
        "image_id": image_id,
        "category_id": category_id,
        "bbox": [x, 0, 0.41 * h, h],
        "score": score,
    }


def _dataset(annotations, images=(1,), categories=(1,)):
    return {
        "images": [{"id": i, "width": 2048, "height": 1024} for i in images],
        "categories": [{"id": c, "name": f"c{c}"} for c in categories],
        "annotations": annotations,
    }


def _write(tmp_path, dataset, results, marks=()):
    """The files as written, each ``"@k"`` replaced by the JSON literal ``marks[k]``."""
    text = json.dumps(dataset)
    for k, literal in enumerate(marks):
        text = text.replace(f'"@{k}"', literal)
    gt, dt = tmp_path / "gt.json", tmp_path / "dt.json"
    gt.write_text(text)
    dt.write_text(json.dumps(results))
    return gt, dt


def _script(gt, dt):
    """The transliteration on the files as Python's json reads them (as the script)."""
    try:
        return pedestrian_oracle.cityscale_script(
            json.loads(gt.read_text()), json.loads(dt.read_text())
        )
    except (TypeError, ValueError, OverflowError) as error:
        return error


def _ours(gt, dt, cache=None):
    truth = load_truth(gt, cache_dir=cache)
    return evaluate_setups(truth, load_predictions(dt, truth), "miss-rate-cityscale")


def _agree(gt, dt, record=None, field=None, cache=None):
    """Ours equals the script: the same four setups, or refused where it raises,
    naming ``record`` and ``field``."""
    reference = _script(gt, dt)
    if isinstance(reference, Exception):
        with pytest.raises(InputError) as e:
            _ours(gt, dt, cache)
        assert str(gt) in str(e.value)
        if record is not None:
            assert (e.value.record, e.value.field) == (record, field), str(e.value)
        return e.value
    ours = _ours(gt, dt, cache)
    for setup, (mean_s, mrs) in zip(SETUPS, reference):
        level = ours["levels"][setup]
        if mrs is None:
            assert level["miss_rate"] is None, setup
        else:
            assert level["miss_rate"] == mean_s, setup
            assert level["classes"]["c1"]["reference_miss_rate"] == mrs, setup
    return ours


# --- vis_ratio: _prepare's short-circuit ---------------------------------------------


@pytest.mark.parametrize("literal", ["null", '"0.9"', "[1]", "{}"])
@pytest.mark.parametrize(
    "height, raises",
    [
        (10.0, False),  # below every HtRng (20): the height test stops the `or`
        (2e10, False),  # above every 1e5 ** 2
        (30.0, True),  # only `all` (20..1e10) compares it
        (60.0, True),  # reasonable compares it first
    ],
)
def test_a_vis_ratio_is_refused_only_where_the_height_test_lets_it_through(
    tmp_path, literal, height, raises
):
    dataset = _dataset([_ann(1, 0.0), _ann(2, 500.0, h=height, vis_ratio="@0")])
    gt, dt = _write(tmp_path, dataset, [_det(0.0), _det(900.0, score=0.8)], [literal])
    assert isinstance(_script(gt, dt), Exception) is raises
    _agree(gt, dt, "annotations[1]", "vis_ratio")


def test_the_record_named_is_the_one_the_script_raises_on(tmp_path):
    """In setup 0 (reasonable, h >= 50) the script reaches the second annotation (h
    100) first; the first one (h 30) would only be compared in `all`."""
    dataset = _dataset(
        [_ann(1, 0.0, h=30.0, vis_ratio=None), _ann(2, 100.0, vis_ratio=None), _ann(3, 300.0)]
    )
    gt, dt = _write(tmp_path, dataset, [_det(300.0)])
    _agree(gt, dt, "annotations[1]", "vis_ratio")


@pytest.mark.parametrize("where", [{"image_id": 77}, {"category_id": 5}])
def test_a_vis_ratio_the_script_never_reads_is_not_refused(tmp_path, where):
    """``getAnnIds(imgIds=p.imgIds, catIds=p.catIds)``: an annotation of an unlisted
    image or category never reaches ``_prepare`` (left out, counted)."""
    dataset = _dataset([_ann(1, 0.0), _ann(2, 100.0, vis_ratio=None, **where)])
    gt, dt = _write(tmp_path, dataset, [_det(0.0)])
    _agree(gt, dt)


def test_other_protocols_never_read_vis_ratio(tmp_path):
    """pycocotools and the toolbox never read the key (a refusal only where the
    city-scale script compares it)."""
    dataset = _dataset([_ann(1, 0.0, vis_ratio=None)])
    gt, dt = _write(tmp_path, dataset, [_det(0.0)])
    truth = load_truth(gt)
    headline = evaluate_setups(truth, load_predictions(dt, truth), "miss-rate")["headline"]
    assert headline == pytest.approx(1e-10)  # every box found: the toolbox's 1e-10 floor


# --- ignore: computeIoU's int() --------------------------------------------------------


_RAISING = [
    "NaN",
    "Infinity",
    "-Infinity",
    "1e400",
    "null",
    '"x"',
    '""',
    '"0.5"',
    "[]",
    "[1]",
    "{}",
]


@pytest.mark.parametrize("literal", _RAISING)
def test_an_ignore_int_cannot_read_is_refused_where_computeIoU_runs(tmp_path, literal):
    dataset = _dataset([_ann(1, 0.0, ignore="@0"), _ann(2, 100.0)])
    gt, dt = _write(tmp_path, dataset, [_det(0.0), _det(100.0, score=0.8)], [literal])
    assert isinstance(_script(gt, dt), (ValueError, OverflowError, TypeError))
    error = _agree(gt, dt, "annotations[0]", "ignore")
    assert "int(" in str(error)


@pytest.mark.parametrize("literal", ["NaN", "null", '"x"', "[1]"])
@pytest.mark.parametrize(
    "case",
    [
        "no detection in the image",
        "detections below the height filter",  # 10 < 20 / 1.25: left out in every setup
        "the box outside every setup",  # _prepare set ignore = 1 first
        "another category's detections",
    ],
)
def test_an_ignore_int_cannot_read_is_scored_where_computeIoU_never_runs(tmp_path, literal, case):
    marked = _ann(1, 0.0, ignore="@0", image_id=2)
    results = [_det(500.0), _det(700.0, score=0.3)]  # image 1
    if case == "detections below the height filter":
        results.append(_det(0.0, h=10.0, image_id=2))
    elif case == "the box outside every setup":
        marked = _ann(1, 0.0, h=10.0, ignore="@0", image_id=2)
        results.append(_det(0.0, h=10.0, image_id=2))
    elif case == "another category's detections":
        results.append(_det(0.0, image_id=2, category_id=2))
    dataset = _dataset([marked, _ann(2, 500.0)], images=(1, 2), categories=(1, 2))
    gt, dt = _write(tmp_path, dataset, results, [literal])
    assert not isinstance(_script(gt, dt), Exception)
    _agree(gt, dt)


def test_every_category_is_evaluated(tmp_path):
    """``evaluate`` runs ``evaluateImg`` for every listed category (``accumulate``
    reads category 1 only): a NaN ignore on a category-2 box with a category-2
    detection raises."""
    dataset = _dataset(
        [_ann(1, 0.0), _ann(2, 300.0, category_id=2, ignore="@0")], categories=(1, 2)
    )
    gt, dt = _write(tmp_path, dataset, [_det(0.0), _det(300.0, category_id=2)], ["NaN"])
    _agree(gt, dt, "annotations[1]", "ignore")


@pytest.mark.parametrize("literal", ["0.5", "true", "-0.0", str(10**400), "1e300"])
def test_an_ignore_int_reads_is_scored_as_the_script(tmp_path, literal):
    dataset = _dataset([_ann(1, 0.0, ignore="@0"), _ann(2, 100.0)])
    gt, dt = _write(tmp_path, dataset, [_det(0.0), _det(100.0, score=0.8)], [literal])
    _agree(gt, dt)


def test_whole_and_cached_loads_agree_and_the_cli_exits_2(tmp_path):
    dataset = _dataset([_ann(1, 0.0, ignore="@0"), _ann(2, 100.0, h=10.0, vis_ratio=None)])
    gt, dt = _write(tmp_path, dataset, [_det(0.0)], ["NaN"])
    cache = tmp_path / "cache"
    messages = {str(_agree(gt, dt, "annotations[0]", "ignore", c)) for c in (None, cache, cache)}
    assert len(messages) == 1
    assert load_truth(gt, cache_dir=cache).cityscale_faults == load_truth(gt).cityscale_faults
    run = subprocess.run(
        [sys.executable, "-m", "evaluation.engine", "score", "--truth", str(gt),
         "--predictions", str(dt), "--protocol", "miss-rate-cityscale"],
        capture_output=True, text=True,
    )  # fmt: skip
    assert run.returncode == 2 and "Traceback" not in run.stderr
    assert "annotations[0]" in run.stderr and "'ignore'" in run.stderr


@pytest.mark.parametrize("first_written", ["tall", "short"])
def test_the_cap_before_computeIoU_takes_the_scripts_exact_order(tmp_path, first_written):
    """1,001 detections on the image of a NaN ignore: 1,000 score -2**62 and are 10 px
    tall (below every setup's filter), one scores -2**62 - 1 and is 100 px tall. The
    script's argsort of the exact (int64) values puts that one last, so the cap of 1,000
    cuts it whatever the file order, no detection is left, computeIoU never runs and the
    file is scored. float64 ties them all: its stable order would keep the tall one
    when written first, and refuse."""
    tall = _det(0.0, score=-(2**62) - 1)
    short = [_det(300.0, h=10.0, score=-(2**62)) for _ in range(1000)]
    results = [tall, *short] if first_written == "tall" else [*short, tall]
    dataset = _dataset([_ann(1, 0.0, ignore="@0"), _ann(2, 500.0, image_id=2)], images=(1, 2))
    results.append(_det(500.0, image_id=2))
    gt, dt = _write(tmp_path, dataset, results, ["NaN"])
    assert not isinstance(_script(gt, dt), Exception)
    _agree(gt, dt)


def test_the_cap_keeps_what_the_exact_order_ranks_first(tmp_path):
    """The mirror case: the tall detection scores -2**62 + 1, written last. The script
    ranks it first (exact) and keeps it: computeIoU runs and int(NaN) raises. float64's
    stable order would cut it (the last of 1,001 ties) and score the file."""
    results = [_det(300.0, h=10.0, score=-(2**62)) for _ in range(1000)]
    results.append(_det(0.0, score=-(2**62) + 1))
    gt, dt = _write(tmp_path, _dataset([_ann(1, 0.0, ignore="@0")]), results, ["NaN"])
    assert isinstance(_script(gt, dt), ValueError)
    _agree(gt, dt, "annotations[0]", "ignore")


# --- random files against the transliteration ----------------------------------------

_IGNORES = ["0", "1", "0.5", "NaN", "Infinity", "null", '"x"', "[]", "true"]
_VIS = ["1.0", "0.3", "NaN", "null", '"0.9"']


@st.composite
def _files(draw):
    annotations, marks = [], []
    for k in range(draw(st.integers(1, 6))):
        h = draw(st.sampled_from([10.0, 30.0, 60.0, 100.0]))
        ann = _ann(k + 1, k * 60.0, h=h, image_id=draw(st.sampled_from([1, 2, 3])))
        ann["category_id"] = draw(st.sampled_from([1, 1, 2]))
        for key, values in (("ignore", _IGNORES), ("vis_ratio", _VIS)):
            ann[key] = f"@{len(marks)}"
            marks.append(draw(st.sampled_from(values)))
        annotations.append(ann)
    results = [
        _det(a["bbox"][0], h=draw(st.sampled_from([10.0, a["height"]])), image_id=a["image_id"],
             category_id=a["category_id"], score=draw(st.sampled_from([0.3, 0.9])))
        for a in annotations
        if draw(st.booleans())
    ]  # fmt: skip
    results.append(_det(900.0, score=0.5))
    return _dataset(annotations, images=(1, 2, 3), categories=(1, 2)), results, marks


@settings(
    max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(files=_files())
def test_random_files_raise_and_score_as_the_script(tmp_path, files):
    dataset, results, marks = files
    _agree(*_write(tmp_path, dataset, results, marks))


def test_hashes_keep_apart_only_what_scores_differently(tmp_path):
    """A null ignore scores as 0 wherever it is accepted (falsy in ``_prepare``), as it
    did when it was left unread: the split keeps its hash. Truthy text is an ignore box
    of the script (unread, 0, before engine 2.15.8): it hashes apart."""
    hashes = {}
    for literal in ("0", "null", '"x"'):
        dataset = _dataset([_ann(1, 0.0, ignore="@0")])
        gt, _ = _write(tmp_path, dataset, [], [literal])
        hashes[literal] = load_truth(gt).content_hash()
    assert hashes["null"] == hashes["0"] != hashes['"x"']


# --- annotation id: evaluateImg's dtm[tind, dind] = gt[bstg]["id"] ----------------------


@pytest.mark.parametrize("literal", ['"x"', '"null"', "1" + "0" * 400])
@pytest.mark.parametrize(
    "height, ignore, matched",
    [
        (100.0, 0, True),  # a regular box matched in every setup
        (100.0, 1, True),  # an ignore box: the match writes its id too
        (15.0, 0, True),  # below every height range: an ignore box a 16 px one matches
        (100.0, 0, False),  # no detection overlaps it
    ],
)
def test_an_annotation_id_numpy_cannot_write_is_refused_where_matched(
    tmp_path, literal, height, ignore, matched
):
    """The script (``pedestrian_oracle.cityscale_coco``'s ``evaluateImg``) writes the
    matched box's id into the float ``dtm``: text no float reads and an integer beyond
    float64 raise there, on any match (regular or ignore box); unmatched it scores."""
    x = 0.0 if matched else 1500.0
    dataset = _dataset([_ann("@0", x, h=height, ignore=ignore), _ann(2, 700.0)])
    results = [_det(0.0, h=max(height, 16.0)), _det(700.0, score=0.8), _det(300.0, score=0.7)]
    gt, dt = _write(tmp_path, dataset, results, [literal])
    error = _agree(gt, dt, "annotations[0]", "id")
    assert isinstance(error, InputError) == matched


@pytest.mark.parametrize("literal", ['"nan"', '" 2 "', '"1_0"', '"-0"', "null", "true"])
def test_annotation_ids_numpy_writes_score_as_the_script(tmp_path, literal):
    """Ids numpy writes into ``dtm`` (text float reads, null as NaN, true as 1): scored
    as the script scores them (a text "-0" reads as 0: no match)."""
    dataset = _dataset([_ann("@0", 0.0), _ann(2, 700.0)])
    results = [_det(0.0), _det(700.0, score=0.8), _det(300.0, score=0.7)]
    _agree(*_write(tmp_path, dataset, results, [literal]))
