"""Given bboxes of nested lists or RLE objects, which pycocotools 2.0.11 reads only
where an image and class hold no ground truth.

Under the caption, as-given and mask readings ``computeIoU`` passes each result's own
``bbox`` to ``maskUtils.iou(d, g, iscrowd)``; its ``_preproc`` converts ``d`` whole
(``np.array(d, dtype=np.double)`` when every entry is a list of 4, ``_frString`` when
every entry is a dict) and ``iou`` returns ``[]`` when ``g`` is empty before reading a
value: a group without truth whose compared boxes are all ``[[2], [3], [10], [8]]``
(or all RLE objects) scores, its detections false positives with their ``area``;
truth, a ragged mix or a dict beside a list raises. Each case runs through pycocotools
2.0.11 (``pycocotools_eval``): where it scores the file, every summary number and
per-class AP equal its numbers (``test_coco_reference._compare``), on every load path
(``load_paths.every_path_agrees``); where it raises, the file is refused naming file,
record and field.
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.loaders import results_stream, uncompared

from .conftest import pycocotools_eval
from .load_paths import as_pycocotools, every_path_agrees
from .test_coco_reference import _compare
from .test_mask_results import _files, _rect
from .test_uncompared import _SPLIT, _good

NESTED = [[2], [3], [10], [8]]  # numpy shape (4, 1)
WIDER = [[2, 1], [3, 1], [10, 1], [8, 1]]  # (4, 2)
EMPTY = [[], [], [], []]  # (4, 0)
RLE = _rect(30, 40, 3, 2, 8, 10)


def _with_box(reading, i, score, box, image=2, category=1, area=None):
    """A readable detection of ``reading`` whose bbox is ``box`` (image 2, class car
    holds no truth in ``_SPLIT``)."""
    record = _good(reading, i, score, image, category)
    record["bbox"] = box
    if area is not None:
        record["area"] = area
    return record


def _scores(tmp_path, split, detections, monkeypatch=None):
    """Scored as pycocotools 2.0.11 scores the file (``_compare`` runs it); with
    ``monkeypatch``, every load path gives the whole load's columns and counts."""
    _compare(tmp_path, split, detections)
    gt, dt = _files(tmp_path, split, detections)
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    if monkeypatch is not None:
        every_path_agrees(tmp_path, monkeypatch, dt, truth, whole, 300)
    return whole


def _refused(tmp_path, split, detections, record, field="bbox"):
    """pycocotools 2.0.11 raises; refused naming file, record and field, whole and a
    block at a time (40-byte slices: ranks and kinds from the whole file)."""
    gt, dt = _files(tmp_path, split, detections)
    with pytest.raises(Exception):  # noqa: B017 - ValueError, KeyError, TypeError, Exception
        pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    for chunk in (None, 40):
        with pytest.MonkeyPatch.context() as m:
            if chunk:
                m.setattr(results_stream, "CHUNK_BYTES", chunk)
            with pytest.raises(InputError) as error:
                load_predictions(dt, truth)
        assert (error.value.record, error.value.field) == (f"record {record}", field)
        assert str(dt) in str(error.value)


def _caption_file(*boxes, areas=(300.0, 5000.0, 20000.0)):
    """A caption file: a true positive of image 1 (the first result), then false
    positives of image 2, class car, scored above it, with ``boxes``."""
    out = [_good("caption", 0, 0.5)]
    for i, box in enumerate(boxes):
        out.append(_with_box("caption", i, 0.9 - i / 100, box, area=areas[i % len(areas)]))
    return out


@pytest.mark.parametrize("box", [NESTED, WIDER, EMPTY, [[[2]], [[3]], [[10]], [[8]]], RLE])
def test_a_group_without_truth_scores_as_pycocotools(tmp_path, monkeypatch, box):
    """Image 2, class car holds no truth; three detections there with boxes of one kind
    (areas in the small, medium and large ranges): false positives, as there, on every
    load path; loaded with a NaN box and their own area."""
    detections = _caption_file(box, box, box)
    predictions = _scores(tmp_path, _SPLIT, detections, monkeypatch)
    assert np.isnan(predictions.boxes[1:]).all()
    assert predictions.area[1:].tolist() == [300.0, 5000.0, 20000.0]
    assert uncompared.COUNT not in predictions.box_counts


def test_nested_text_and_null_values_score_as_pycocotools(tmp_path):
    """numpy makes doubles of numeric text and null (NaN) in the nested lists too."""
    _scores(tmp_path, _SPLIT, _caption_file([["2"], [None], ["10"], [8]], NESTED))


@pytest.mark.parametrize(
    "boxes",
    [
        (NESTED, WIDER),  # two shapes: np.array ragged, ValueError
        (NESTED, [2, 3, 10, 8]),  # beside a plain box: ValueError
        ([2, 3, 10, 8], NESTED),
        (RLE, NESTED),  # a dict beside a list: iou's "list input" Exception
        (NESTED, RLE),
        ([[2], [3, 4], [10], [8]],),  # ragged alone
        ({"size": [30, 40]},),  # _frString: KeyError 'counts'
        ({"size": [30, 40], "counts": None},),  # TypeError
        ({"size": [-1, 40], "counts": "52"},),  # OverflowError
        ([["a"], [3], [10], [8]],),  # float('a'): ValueError
    ],
)
def test_mixed_or_unreadable_kinds_are_refused(tmp_path, boxes):
    """pycocotools 2.0.11 raises in ``_preproc``; refused naming the bbox of the first
    record of the group whose box is not 4 numbers."""
    record = 1 + [b == [2, 3, 10, 8] for b in boxes].index(False)
    _refused(tmp_path, _SPLIT, _caption_file(*boxes), record=record)


@pytest.mark.parametrize("box", [NESTED, RLE])
def test_a_group_with_truth_is_refused(tmp_path, box):
    """Image 1, class car holds two boxes: ``iou`` converts them and raises on the
    detection's (numpy ``bbIou`` buffer / ``input data type not allowed``)."""
    detections = [_good("caption", 0, 0.5), _with_box("caption", 1, 0.9, box, image=1)]
    _refused(tmp_path, _SPLIT, detections, record=1)


def test_a_crowd_region_is_truth(tmp_path):
    """A crowd annotation alone is in ``_gts``: refused there too."""
    split = json.loads(json.dumps(_SPLIT))
    split["annotations"].append(
        {"id": 9, "image_id": 2, "category_id": 1, "bbox": [0, 0, 5, 5], "area": 25, "iscrowd": 1}
    )
    _refused(tmp_path, split, _caption_file(NESTED), record=1)


def test_a_bad_area_is_refused_on_area(tmp_path):
    """No truth, the box read: ``evaluateImg`` compares the text area, TypeError."""
    _refused(tmp_path, _SPLIT, _caption_file(NESTED, areas=("80",)), record=1, field="area")


def test_beyond_the_cap_of_a_group_with_truth_it_is_loaded(tmp_path, monkeypatch):
    """100 plain detections of image 1 and a nested box ranked 101st: never compared
    there; scored, the record loaded (NaN box), nothing left out."""
    flood = [_good("caption", i, 0.5 - i * 1e-4) for i in range(100)]
    late = _with_box("caption", 3, 0.001, NESTED, image=1)
    predictions = _scores(tmp_path, _SPLIT, [*flood, late], monkeypatch)
    assert len(predictions) == 101 and np.isnan(predictions.boxes[100]).all()


def test_a_plain_box_beyond_the_cap_of_nested_boxes_scores(tmp_path, monkeypatch):
    """100 nested boxes of image 2 and a plain one ranked 101st: scored, as there."""
    flood = [_with_box("caption", i, 0.9 - i * 1e-4, NESTED, area=80.0) for i in range(100)]
    detections = [_good("caption", 0, 0.5), *flood, _with_box("caption", 1, 0.01, [2, 3, 4, 5])]
    _scores(tmp_path, _SPLIT, detections, monkeypatch)


def test_the_as_given_reading_scores_as_pycocotools(tmp_path, monkeypatch):
    """The first result of an unlisted class with an empty bbox makes the file read as
    given (own ids): nested boxes of image 2 score as there."""
    detections = [
        {k: v for k, v in d.items() if k != "caption"} | {"id": i + 1}
        for i, d in enumerate(_caption_file(NESTED, NESTED))
    ]
    detections.insert(0, {"id": 99, "image_id": 1, "category_id": 9, "bbox": [], "score": 0.1})
    _scores(tmp_path, _SPLIT, detections, monkeypatch)
    detections[2]["bbox"] = WIDER
    _refused(tmp_path, _SPLIT, detections, record=2)


def _mask(i, score, box, image=2, listed=False):
    record = _good("mask", i, score, image)
    if listed:
        record["segmentation"] = [record["segmentation"]]
    record["bbox"] = box
    return record


def test_masks_with_nested_boxes_score_as_pycocotools(tmp_path, monkeypatch):
    """Mask reading, image 2, class car (no truth): single masks with nested boxes
    (area: the mask's), then lists of one mask with nested boxes beside each other:
    scored as there, on every load path."""
    first = _good("mask", 0, 0.5)
    detections = [first, _mask(1, 0.9, NESTED), _mask(2, 0.8, NESTED)]
    (tmp_path / "single").mkdir()
    predictions = _scores(tmp_path / "single", _SPLIT, detections, monkeypatch)
    assert predictions.area[1:].tolist() == [80.0, 80.0]
    listed = [first, _mask(1, 0.9, NESTED, listed=True), _mask(2, 0.8, NESTED, listed=True)]
    (tmp_path / "listed").mkdir()
    _scores(tmp_path / "listed", _SPLIT, listed, monkeypatch)


@pytest.mark.parametrize("listed_first", [True, False])
def test_a_list_beside_a_single_mask_with_nested_boxes_is_refused(tmp_path, listed_first):
    """Same box shape, areas of two kinds (an array of one, a number): ``evaluateImg``'s
    np.array raises ValueError; refused naming the bbox of the first such record."""
    pair = [
        _mask(1, 0.9, NESTED, listed=listed_first),
        _mask(2, 0.8, NESTED, listed=not listed_first),
    ]
    _refused(tmp_path, _SPLIT, [_good("mask", 0, 0.5), *pair], record=1)


def test_a_mask_with_a_nested_box_beside_truth_is_refused(tmp_path):
    _refused(tmp_path, _SPLIT, [_good("mask", 0, 0.5), _mask(1, 0.9, NESTED, image=1)], record=1)


_BIG = 2**53 + 1  # np.unique([0.5, 2**53 + 1]) gives 2.0**53: this category is lost


def _lost_split(alias_box):
    """Categories 0.5 and 2**53 + 1, which pycocotools' np.unique changes into 2**53
    (image 1 holds a box of each, the latter never found); with ``alias_box``, an
    annotation of image 1 written with 2**53, which it finds."""
    annotations = [
        {"id": 1, "image_id": 1, "category_id": 0.5, "bbox": [2, 3, 10, 8], "area": 80.0},
        {"id": 3, "image_id": 1, "category_id": _BIG, "bbox": [2, 3, 10, 8], "area": 80.0},
    ]
    if alias_box:
        annotations.append(
            {"id": 2, "image_id": 1, "category_id": 2**53, "bbox": [20, 5, 12, 9], "area": 108}
        )
    for a in annotations:
        a["iscrowd"] = 0
    return {
        "images": [{"id": 1}, {"id": 2}],
        "annotations": annotations,
        "categories": [{"id": 0.5, "name": "a"}, {"id": _BIG, "name": "b"}],
    }


@pytest.mark.parametrize("alias_box", [True, False])
def test_under_a_changed_value_truth_decides(tmp_path, alias_box):
    """A nested box of image 1 under the changed value 2**53: pycocotools finds the
    box written with it (``GroundTruth.alias``) and raises; without it, scores. One
    under the lost id itself, beside that id's own box, is never looked up: scored
    either way."""
    first = _good("caption", 0, 0.5, 1, 0.5)
    lost_own = _with_box("caption", 1, 0.95, NESTED, image=1, category=_BIG, area=80.0)
    under = _with_box("caption", 2, 0.9, NESTED, image=1, category=2**53, area=80.0)
    split = _lost_split(alias_box)
    if alias_box:
        _refused(tmp_path, split, [first, lost_own, under], record=2)
        gt, dt = _files(tmp_path, split, [first, lost_own])  # the summary: the lost
        truth = load_truth(gt)  # class's per-class row is the alias box's here
        as_pycocotools(gt, dt, truth, load_predictions(dt, truth))
    else:
        _scores(tmp_path, split, [first, lost_own, under])


_KINDS = {
    "plain": [5, 6, 10, 8],
    "nested": NESTED,
    "wider": WIDER,
    "rle": RLE,
    "bad rle": {"size": [30, 40]},
}


@settings(
    max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    st.sampled_from(["caption", "mask"]),
    st.sampled_from(["nested", "rle", "plain"]),
    st.booleans(),
    st.lists(
        st.tuples(
            st.sampled_from([(1, 1), (2, 1), (2, 1), (1, 2), (1, 2), (2, 2)]),
            st.sampled_from(["same"] * 12 + ["nested", "rle", "plain", "wider", "bad rle"]),
            st.integers(0, 9),
            st.sampled_from([50.0, 2000.0, 12000.0]),
            st.sampled_from([False] * 8 + [True]),
        ),
        min_size=1,
        max_size=8,
    ),
)
def test_random_groups_score_or_refuse_as_pycocotools(tmp_path, reading, main, lists, plan):
    """Random caption or mask files over groups with and without truth, boxes mostly of
    one kind, some of every other (ties included; masks single or in a list of one,
    mostly alike): every summary number and
    per-class AP equal pycocotools 2.0.11's, or refused naming a bbox (the
    segmentation, for a list beside a single mask) where it raises."""
    detections = [_good(reading, 0, 0.55)]
    for i, ((image, category), kind, score, area, flip) in enumerate(plan):
        box = _KINDS[main if kind == "same" else kind]
        record = _with_box(reading, i, score / 10, box, image, category, area)
        if reading == "mask":
            record.pop("area")
            if lists != flip:
                record["segmentation"] = [record["segmentation"]]
        detections.append(record)
    gt, dt = _files(tmp_path, _SPLIT, detections)
    try:
        pycocotools_eval(gt, dt)
    except Exception:  # noqa: BLE001 - whatever _preproc, bbIou or evaluateImg raises
        event(f"{reading} refused")
        with pytest.raises(InputError) as error:
            load_predictions(dt, load_truth(gt))
        assert error.value.field in ("bbox", "segmentation")
        return
    event(f"{reading} scored")
    _scores(tmp_path, _SPLIT, detections)
