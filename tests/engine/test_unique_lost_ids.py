"""Images whose id pycocotools' ``np.unique`` changes are left out, as it leaves them out.

pycocotools 2.0.11 ``COCOeval.evaluate`` runs ``p.imgIds = list(np.unique(p.imgIds))``
and then looks every image up by those numpy values in dicts keyed by the ids as the
JSON file gives them (``imgToAnns``, ``_gts``, ``_dts``). An id numpy does not hold as
written — rounded in a float64 array (ints in [2^63, 2^64) beside a smaller int, or
beside a fraction ints beyond 2^53), or cut in a text array (a trailing U+0000) — finds
no ground truth and no detections: that image scores nothing. Every check here runs
pycocotools 2.0.11 itself (``conftest.pycocotools_eval``) on the very file.
"""

import dataclasses
import json
import json.decoder

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import (
    COCO_SUMMARY_KEYS,
    InputError,
    annotate,
    evaluate,
    load_predictions,
    load_truth,
    match,
    score_records,
    shards,
    slice_scores,
)
from evaluation.engine.loaders import json_syntax
from evaluation.engine.loaders.ids import unique_lost
from evaluation.engine.pieces import stream_pieces

from .conftest import as_reference, pycocotools_eval
from .synthetic import make_detections, make_split
from .test_class_groups import N_CLASSES, _grouped, _same_records

BOX = [10, 10, 20, 20]
#: The NaN object Python's ``json`` gives for every ``NaN`` literal: pycocotools'
#: dicts and numpy object arrays find it by identity, a float64 array's NaN never.
NAN = json.decoder.NaN


def _split(image_ids):
    """One box per image, one class; detections: a hit on every image, a miss on the
    first two (so leaving an image out moves the numbers)."""
    split = {
        "images": [{"id": i, "width": 200, "height": 200} for i in image_ids],
        "categories": [{"id": 1, "name": "car"}],
        "annotations": [
            {"id": n + 1, "image_id": i, "category_id": 1, "bbox": BOX, "area": 400, "iscrowd": 0}
            for n, i in enumerate(image_ids)
        ],
    }
    detections = [
        {"image_id": i, "category_id": 1, "bbox": BOX, "score": 0.5 + 0.01 * (n % 7)}
        for n, i in enumerate(image_ids)
    ] + [
        {"image_id": i, "category_id": 1, "bbox": [100, 100, 20, 20], "score": 0.9}
        for i in image_ids[:2]
    ]
    return split, detections


def _run(tmp_path, split, detections, protocol="coco"):
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = load_truth(tmp_path / "gt.json")
    return truth, evaluate(truth, load_predictions(tmp_path / "dt.json", truth), protocol)


def _compare(tmp_path, split, detections):
    """Our ``coco`` numbers on the file equal pycocotools 2.0.11's (12 numbers, and AP,
    AP50, recall of the class)."""
    truth, ours = _run(tmp_path, split, detections)
    reference = pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    precision = reference.eval["precision"][:, :, 0, 0, 2]
    row = ours["per_class"]["car"]
    if np.all(precision == -1):
        assert row["AP"] is None
    else:
        assert row["AP"] == pytest.approx(np.mean(precision), abs=1e-12)
        assert row["AP50"] == pytest.approx(np.mean(precision[0]), abs=1e-12)
        recall = reference.eval["recall"][:, 0, 0, 2]
        assert row["recall"] == pytest.approx(np.mean(recall), abs=1e-12)
    return truth, ours, reference


def _lost_ids(ids, reference):
    """The ids whose image pycocotools 2.0.11 evaluated with nothing: no ``evalImgs``
    entry of it holds its one box (each image of ``_split`` has one)."""
    seen = {e["image_id"] for e in reference.evalImgs if e is not None}  # numpy values
    return [i for i in ids if i not in seen]  # the lookup pycocotools makes


@pytest.mark.parametrize(
    "ids, lost",
    [
        ([2**63 + 1, 5], [2**63 + 1]),  # int64 + uint64: float64, 2^63 + 1 -> 2^63
        ([2**63, 5], []),  # 2.0**63 == 2**63: found, the image is scored
        ([2**63, 2**63 + 1, -1], [2**63 + 1]),  # both -> 2^63: one entry, 2^63's
        ([2**63 + 1, 2**63 + 3], []),  # all uint64: exact
        ([2**63 + 1, True], []),  # bool + uint64: uint64, exact
        ([2**63 + 1, 1], [2**63 + 1]),  # the same value as an int: float64
        ([2**53 + 1, 0.5], [2**53 + 1]),  # a fraction: float64
        ([2**53 + 1, 2.0], [2**53 + 1]),  # a whole float too
        ([2**64 + 1, 2**63 + 1, -1], []),  # beyond uint64: an object array, exact
        ([float("inf"), 2**63 + 1], [2**63 + 1]),
        (["a\x00", "b"], ["a\x00"]),  # '<U' arrays cut trailing U+0000
        (["a\x00", "a"], ["a\x00"]),  # ... "a" is scored once
        (["\x00", ""], ["\x00"]),
        (["a\x00b", "a"], []),  # inside: kept
        ([1, NAN, 3], [NAN]),  # float64; numpy's NaN is a new object, equal to nothing
        ([NAN, 0.5, 2**53 + 1], [NAN, 2**53 + 1]),
        ([2**64, NAN, 3, 1], []),  # object array: it holds the file's NaN, found
        ([3, NAN, 2**64 + 1, 1, -5, 2], []),  # ... and sorted as Python's sort leaves it
    ],
)
def test_worked_cases_equal_pycocotools(tmp_path, ids, lost):
    """Each case: the ids pycocotools loses (its own ``np.unique`` and lookups), the
    engine's rule (``loaders.ids.unique_lost``), and the numbers, all equal; the lost
    images are counted in ``counts.images_left_out`` with the reason."""
    split, detections = _split(ids)
    truth, ours, reference = _compare(tmp_path, split, detections)
    assert _lost_ids(ids, reference) == lost  # pycocotools' own outcome
    assert [ids[i] for i in unique_lost(ids)] == lost
    left_out = ours["counts"].get("images_left_out")
    if not lost:
        assert left_out is None
        return
    assert left_out["images"] == len(lost) and left_out["truth_boxes"] == len(lost)
    assert "np.unique" in left_out["reason"]
    assert len(truth.unique_lost_images) == len(lost)


def test_a_nan_image_sorts_last_as_numpy_sorts_it(tmp_path):
    """Python's ``sorted([3, nan, 1])`` leaves the list as it is (every comparison with
    NaN is false); pycocotools' ``np.unique`` then orders the ids 1, 3, NaN, and ties
    across images follow that order. A tie between a miss on image 1 and a hit on
    image 3 moves AP with the order: equal to pycocotools 2.0.11 here."""
    split, _ = _split([3, NAN, 1])
    detections = [
        {"image_id": 1, "category_id": 1, "bbox": [100, 100, 20, 20], "score": 0.9},
        {"image_id": 3, "category_id": 1, "bbox": BOX, "score": 0.9},
        {"image_id": 1, "category_id": 1, "bbox": BOX, "score": 0.5},
    ]
    truth, ours, _ = _compare(tmp_path, split, detections)
    assert ours["per_class"]["car"]["AP50"] < 0.9  # the miss ranks first
    assert truth.image_ids.tolist() == ["1", "3", "nan"]


def test_a_lost_image_moves_the_numbers_as_pycocotools_does(tmp_path):
    """The lost image holds the only hit: pycocotools scores AP 0 there (its misses on
    the other image stay); without the rule the image would score."""
    ids = [2**63 + 1, 7]
    split, detections = _split(ids)
    split["annotations"] = split["annotations"][:1]  # the lost image holds the box
    detections = [d for d in detections if d["image_id"] == 2**63 + 1][:1] + [
        {"image_id": 7, "category_id": 1, "bbox": [100, 100, 20, 20], "score": 0.9}
    ]
    _, ours, reference = _compare(tmp_path, split, detections)
    assert reference.stats[0] == -1.0  # no ground truth left: absent
    assert ours["summary"]["AP"] is None


def test_other_protocols_score_every_image(tmp_path):
    """The VOC protocols follow the devkit, which keeps every id: nothing left out;
    ``recall40`` follows pycocotools' rules and leaves the image out."""
    split, detections = _split([2**63 + 1, 5])
    detections = detections[:-1]  # a miss on the lost image only
    _, voc = _run(tmp_path, split, detections, "voc")
    assert "images_left_out" not in voc["counts"]
    _, recall40 = _run(tmp_path, split, detections, "recall40")
    assert recall40["counts"]["images_left_out"]["images"] == 1
    split_without, dets_without = _split([5])
    dets_without = dets_without[:1]
    _, expected = _run(tmp_path, split_without, dets_without, "recall40")
    assert recall40["summary"] == expected["summary"]
    _, voc_without = _run(tmp_path, split_without, dets_without, "voc")
    assert voc["summary"] != voc_without["summary"]


def test_listed_twice_the_first_written_type_decides(tmp_path):
    """``imgs[img['id']] = img`` keeps the key as first written: ``true`` then ``1``
    keeps ``true`` (bool + uint64: uint64, exact); ``1`` then ``true`` keeps ``1``
    (float64: 2^63 + 1 is lost)."""
    hashes = []
    for first, second, lost in ((True, 1, []), (1, True, [2**63 + 1])):
        split, detections = _split([2**63 + 1, first])
        split["images"].append({"id": second, "width": 200, "height": 200})
        truth, ours, _ = _compare(tmp_path, split, detections)
        assert len(truth.unique_lost_images) == len(lost)
        hashes.append(truth.content_hash())
    # the ids shown alike (1), scored otherwise: the lost images enter the hash
    assert hashes[0] != hashes[1]


def test_the_hash_adds_lost_images_only_where_the_ids_types_decide_them(tmp_path):
    """Where the ids as hashed (their text) decide the lost images, the hash is the one
    splits had before (no split frozen earlier changes); ``true`` for 1 beside
    2^63 + 1 (uint64, nothing lost, where 1 loses 2^63 + 1) hashes apart."""
    for ids, by_type in (
        ([2**63 + 1, 5], False),
        (["a\x00", "b"], False),
        ([2**63 + 1, True], True),
    ):
        split, detections = _split(ids)
        truth, _ = _run(tmp_path, split, detections)
        assert truth.unique_lost_by_type is by_type
        before = dataclasses.replace(truth, unique_lost_images=None, unique_lost_by_type=False)
        assert (truth.content_hash() != before.content_hash()) is by_type


KINDS = st.one_of(
    st.integers(-5, 5),
    st.integers(2**53 - 2, 2**53 + 3),
    st.integers(2**63 - 2, 2**63 + 3),
    st.integers(2**64 - 1, 2**64 + 2),
    st.integers(-(2**63) - 1, -(2**63) + 1),
    st.booleans(),
    st.sampled_from([0.5, 2.0, 2.0**53, 2.0**63, float("inf"), -float("inf"), -1.5, NAN]),
)
TEXT = st.text(st.sampled_from(["a", "b", "\x00", "é"]), max_size=3)


def _distinct(values):
    """Ids distinct as dict keys (``1 == 1.0 == True``): the first of each."""
    out = {}
    for v in values:
        out.setdefault(v, v)
    return list(out.values())


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=st.data(), text=st.booleans())
def test_random_id_lists_equal_pycocotools(tmp_path, data, text):
    """Lists of ids of mixed kinds (small and huge ints around 2^53, 2^63, 2^64, bools,
    whole, fractional and infinite floats; or text with U+0000): the engine's lost
    images equal pycocotools' own, and so do the numbers."""
    ids = _distinct(data.draw(st.lists(TEXT if text else KINDS, min_size=1, max_size=6)))
    split, detections = _split(ids)
    _, ours, reference = _compare(tmp_path, split, detections)
    lost = _lost_ids(ids, reference)
    assert [ids[i] for i in unique_lost(ids)] == lost
    assert ours["counts"].get("images_left_out", {}).get("images", 0) == len(lost)


def _lost_split(seed=4):
    """A split of 6 classes whose image ids pycocotools partly loses: every third image
    id moved to 2^63 + 1 + 2k (float64 beside the small ones: all lost) and one whole
    float, and its detections (ties and more than the cap included)."""
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=24, n_classes=N_CLASSES, boxes_per_image=4)
    dets = make_detections(rng, split, score_levels=6)
    moved = {}
    for n, image in enumerate(split["images"]):
        if n % 3 == 0:
            moved[image["id"]] = 2**63 + 1 + 2 * n
        elif n == 1:
            moved[image["id"]] = float(image["id"])  # written 5.0: float64 either way
    for image in split["images"]:
        image["id"] = moved.get(image["id"], image["id"])
    for item in (*split["annotations"], *dets):
        item["image_id"] = moved.get(item["image_id"], item["image_id"])
    return split, dets


@pytest.mark.parametrize("protocol", ["coco", "recall40"])
def test_every_path_gives_the_whole_files_numbers(files, protocol, tmp_path, monkeypatch):
    """Read a few bytes at a time, from the cache, in image shards and class groups
    (the platform's path): the same lost images, records, scorecard and counts as the
    whole file, which equals pycocotools 2.0.11 under ``coco``."""
    split, dets = _lost_split()
    truth, predictions = files.load(split, dets)
    assert len(truth.unique_lost_images) == 8
    if protocol == "coco":
        gt, dt = files.write("gt-ref.json", split), files.write("dt-ref.json", dets)
        reference = pycocotools_eval(gt, dt)
        ours = evaluate(truth, predictions, "coco")
        for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
            assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12)
    whole = match(truth, predictions, protocol)
    tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
    expected = annotate(
        score_records(whole, protocol, tag_masks=tag_masks), truth, predictions, whole, protocol
    )
    assert expected["counts"]["images_left_out"]["images"] == 8
    result, _, merged = _grouped(truth, predictions, protocol, 5, 3, tmp_path)
    _same_records(whole, merged)
    assert json.dumps(result) == json.dumps(expected)

    gt = files.write("gt-again.json", split)
    monkeypatch.setattr(json_syntax, "CHUNK_BYTES", 256)
    for cache in (None, tmp_path / "cache", tmp_path / "cache"):  # build, then read
        again = load_truth(gt, cache_dir=cache)
        assert again.unique_lost_images.tolist() == truth.unique_lost_images.tolist()
        assert again.content_hash() == truth.content_hash()
        assert json.dumps(evaluate(again, predictions, protocol)) == json.dumps(
            evaluate(truth, predictions, protocol)
        )


def _class_split(class_ids):
    """Two images; per class one box on each, a hit on the first image and a miss on
    the second (so each class has its own AP, and a class left out moves the mean)."""
    split = {
        "images": [{"id": 1, "width": 200, "height": 200}, {"id": 2, "width": 200, "height": 200}],
        "categories": [{"id": c, "name": f"class {n}"} for n, c in enumerate(class_ids)],
        "annotations": [],
    }
    detections = []
    for n, c in enumerate(class_ids):
        for image in (1, 2):
            box = [10 + 5 * n, 10, 20 + n, 20]
            split["annotations"].append(
                {
                    "id": len(split["annotations"]) + 1,
                    "image_id": image,
                    "category_id": c,
                    "bbox": box,
                    "area": box[2] * box[3],
                    "iscrowd": 0,
                }  # fmt: skip
            )
        detections.append({"image_id": 1, "category_id": c, "bbox": box, "score": 0.3 + n / 10})
        detections.append({"image_id": 2, "category_id": c, "bbox": [150, 150, 9, 9], "score": 0.9})
    return split, detections


def _compare_classes(tmp_path, class_ids):
    """pycocotools 2.0.11 on the file: the 12 numbers, and each class's AP where its id
    is among ``params.catIds`` (looked up as pycocotools looks it up), else absent."""
    split, detections = _class_split(class_ids)
    truth, ours = _run(tmp_path, split, detections)
    reference = pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    position = {c: k for k, c in enumerate(reference.params.catIds)}
    lost = []
    for n, c in enumerate(class_ids):
        row = ours["per_class"][f"class {n}"]
        k = position.get(c)
        precision = None if k is None else reference.eval["precision"][:, :, k, 0, 2]
        if precision is None or np.all(precision == -1):
            lost.append(c)
            assert row["AP"] is None
        else:
            assert row["AP"] == pytest.approx(np.mean(precision), abs=1e-12)
    return truth, ours, lost


@pytest.mark.parametrize(
    "class_ids, lost",
    [
        ([2**63 + 1, 1], [2**63 + 1]),  # float64: 2^63 + 1 -> 2^63
        ([2**63, 2**63 + 1, -1], [2**63 + 1]),
        ([2**63 + 1, True], []),  # uint64: exact
        ([2**53 + 1, 2.5], [2**53 + 1]),
        (["car\x00", "car"], ["car\x00"]),
        ([2**64 + 1, 2**63 + 1, 1], []),
        ([1, NAN, 2], [NAN]),
        ([2**64, NAN, 3, 1], []),
    ],
)
def test_category_ids_pycocotools_loses_are_left_out_alike(tmp_path, class_ids, lost):
    """``evaluate`` runs ``np.unique`` on ``p.catIds`` too: a category whose id numpy
    changes scores nothing there (absent, out of the mean), here too, counted in
    ``counts.classes_left_out`` and named in the protocol record's absent classes."""
    truth, ours, reference_lost = _compare_classes(tmp_path, class_ids)
    assert reference_lost == lost
    assert [class_ids[i] for i in unique_lost(class_ids)] == lost
    entry = ours["counts"].get("classes_left_out", {})
    assert entry.get("classes", 0) == len(lost)
    absent = ours["protocol_record"]["absent_classes"]
    assert sum("np.unique" in why for why in absent.values()) == len(lost)


@settings(
    max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=st.data(), text=st.booleans())
def test_random_category_id_lists_equal_pycocotools(tmp_path, data, text):
    """Category ids of mixed kinds: the classes left out are pycocotools' absent ones."""
    class_ids = _distinct(data.draw(st.lists(TEXT if text else KINDS, min_size=1, max_size=5)))
    _, ours, lost = _compare_classes(tmp_path, class_ids)
    assert [class_ids[i] for i in unique_lost(class_ids)] == lost
    assert ours["counts"].get("classes_left_out", {}).get("classes", 0) == len(lost)


@pytest.mark.parametrize(
    "images, categories, where, value",
    [
        ([2**63 + 1, 5], [1], "image_id", 2**63),  # float64: 2^63 + 1 -> 2^63
        (["a\x00", "b"], [1], "image_id", "a"),  # '<U': the U+0000 cut
        ([1, 5], [0.5, 2**53 + 1], "category_id", 2**53),  # float64: 2^53 + 1 -> 2^53
        ([1, 5], ["c\x00", "d"], "category_id", "c"),
    ],
)
def test_an_unlisted_id_equal_to_a_changed_value_is_scored_as_pycocotools_scores_it(
    tmp_path, images, categories, where, value
):
    """pycocotools' ``imgToAnns`` and ``_gts`` hold every annotation, listed or not, so
    the value numpy changed a lost id into finds an unlisted image's or category's
    annotations, and pycocotools 2.0.11 scores them under the lost id (its numbers move:
    checked here). Refused before engine 2.19.0; now scored so under ``coco`` (every
    number equal), left out under ``voc`` (``test_changed_value_aliases.py``)."""
    split, detections = _split(images)
    if where == "category_id":
        split["categories"] = [{"id": c, "name": f"c{n}"} for n, c in enumerate(categories)]
        for a in split["annotations"]:
            a["category_id"] = categories[0]
        detections = [{**d, "category_id": categories[0]} for d in detections]
        extra = {"image_id": images[0], "category_id": value}
    else:
        extra = {"image_id": value, "category_id": 1}
    split["annotations"].append({"id": 99, "bbox": BOX, "area": 400, "iscrowd": 0, **extra})
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    reference = pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
    split["annotations"].pop()
    (tmp_path / "gt-without.json").write_text(json.dumps(split))
    without = pycocotools_eval(tmp_path / "gt-without.json", tmp_path / "dt.json")
    assert not np.array_equal(reference.eval["recall"], without.eval["recall"])  # scored
    truth = load_truth(tmp_path / "gt.json")
    ours = evaluate(truth, load_predictions(tmp_path / "dt.json", truth), "coco")
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    assert ours["counts"]["under_changed_value"]["truth_boxes"] == 1


@pytest.mark.parametrize(
    "score, bbox",
    [("high", BOX), (None, BOX), (0.99, [1, 2, 3, 4, 5]), (0.99, ["1", 2, "3", 4])],
)
def test_a_detection_under_a_changed_value_is_refused_where_pycocotools_raises(
    tmp_path, score, bbox
):
    """Categories ``[0.5, 2^53 + 1]``: a detection of category 2^53 (unlisted) on a
    looked-up image is found by pycocotools' ``in catIds`` and ``_dts`` under the lost
    2^53 + 1; with a text or null score ``evaluateImg`` raises there (refused here,
    naming the record), and so it does on a box ``computeIoU`` cannot read (five
    numbers, text inside: found by the fifth red team); readable, it is scored there
    (a false positive of that entry: every number equal)."""
    categories = [0.5, 2**53 + 1]
    split, detections = _class_split(categories)
    gt, dt = tmp_path / "gt.json", tmp_path / "dt.json"
    gt.write_text(json.dumps(split))
    truth = load_truth(gt)
    stray = {"image_id": 1, "category_id": 2**53, "bbox": bbox, "score": score}
    dt.write_text(json.dumps([*detections, stray]))
    with pytest.raises(Exception):  # noqa: B017  pycocotools' own error, whatever it is
        pycocotools_eval(gt, dt)
    with pytest.raises(InputError) as error:
        load_predictions(dt, truth)
    assert error.value.record == f"record {len(detections)}"
    assert error.value.field == ("score" if bbox == BOX else "bbox")
    dt.write_text(json.dumps([*detections, {**stray, "score": 0.99, "bbox": BOX}]))
    reference = pycocotools_eval(gt, dt)
    ours = evaluate(truth, load_predictions(dt, truth), "coco")
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    assert ours["counts"]["under_changed_value"]["detections"] == 1


def test_a_box_beyond_float64_on_a_lost_image_is_not_refused(tmp_path):
    """pycocotools converts a listed annotation's box in ``computeIoU`` only for the
    images it looks up: on an image its ``np.unique`` loses, an integer beyond float64
    in the box is never converted, and it scores the file (refused before, as on any
    listed image: ``beyond_float64.truth_refusal``)."""
    split, detections = _split([2**63 + 1, 5])
    split["annotations"][0]["bbox"] = [10**400, 10, 20, 20]
    _compare(tmp_path, split, detections)
    split, detections = _split([2**63, 5])  # 2^63 is looked up: refused as before
    split["annotations"][0]["bbox"] = [10**400, 10, 20, 20]
    with pytest.raises(InputError, match="annotations\\[0\\]"):
        _run(tmp_path, split, detections)


def _twice_given(case):
    """A split whose category pycocotools' ``np.unique(sorted(catIds))`` gives more
    than once (red team audit11 F4 cases), without a non-crowd box of that category: a
    NaN listed twice (``nan_thrice``: three times) beside an id beyond 64 bits (no box;
    ``crowd_only``: crowd boxes only, ``iscrowd`` 1 and 0.5, both truthy, so ignored
    by ``_prepare``), or 3 and 3.0 the NaN-disturbed sort leaves apart (no box).
    Returns the split, detections, and that category's id."""
    split, detections = _class_split([2**64, 1])
    twice = NAN
    if case == "equal_apart":
        twice = 3
        cats = [{"id": 3, "name": "t"}, {"id": NAN, "name": "n"}, *split["categories"]]
        split["categories"] = cats[:3] + [{"id": 3.0, "name": "t"}] + cats[3:]
    else:
        split["categories"].insert(0, {"id": NAN, "name": "n"})
        split["categories"].insert(2, {"id": NAN, "name": "n"})
    if case == "nan_thrice":
        split["categories"].append({"id": NAN, "name": "n"})
    if case == "crowd_only":
        for n, crowd in enumerate((1, 0.5)):
            box = [120, 120 + 30 * n, 20, 20]
            split["annotations"].append(
                {
                    "id": 90 + n,
                    "image_id": 1,
                    "category_id": NAN,
                    "bbox": box,
                    "area": 400,
                    "iscrowd": crowd,
                }  # fmt: skip
            )
    detections.append({"image_id": 1, "category_id": twice, "bbox": BOX, "score": 0.6})
    return split, detections, twice


#: How many entries pycocotools 2.0.11's ``p.catIds`` gives the category of each case.
TWICE_ENTRIES = {"nan_twice_empty": 2, "crowd_only": 2, "equal_apart": 2, "nan_thrice": 3}


def _reference_columns(tmp_path, split, detections, twice, entries=2):
    """pycocotools 2.0.11 on the split: its 12 numbers, and the precision columns of
    the category ``twice`` (which its own ``params.catIds`` must hold ``entries``
    times)."""
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    reference = pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
    columns = [k for k, c in enumerate(reference.params.catIds) if c is twice or c == twice]
    assert len(columns) == entries  # pycocotools' own outcome
    return reference, reference.eval["precision"][:, :, columns, 0, 2]


def _with_a_regular_box(split, detections, twice):
    """A box of falsy ``iscrowd`` of the category ``twice`` on image 2, and a detection
    of it there (IoU 0.9): every column of it counts in pycocotools' means."""
    box = {"id": 99, "image_id": 2, "category_id": twice, "bbox": [60, 60, 20, 20],
           "area": 400, "iscrowd": 0}  # fmt: skip
    split["annotations"].append(box)
    detections.append({"image_id": 2, "category_id": twice, "bbox": [62, 60, 20, 20],
                       "score": 0.45})  # fmt: skip


@pytest.mark.parametrize("case", ["nan_twice_empty", "crowd_only", "equal_apart"])
def test_a_category_given_twice_without_a_regular_box_is_scored(tmp_path, case):
    """Where the category pycocotools evaluates twice has no box of falsy ``iscrowd``,
    its accumulate skips both columns (no positive: precision -1) and every number is
    the file's with that category once: equal to pycocotools 2.0.11's 12 numbers. Such
    splits scored since engine 2.18.3: the hash leaves the repeats out, so a split
    frozen then keeps its hash."""
    split, detections, twice = _twice_given(case)
    reference, columns = _reference_columns(tmp_path, split, detections, twice)
    assert np.all(columns == -1)
    truth, ours = _run(tmp_path, split, detections)
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    assert truth.class_repeats is not None
    once = dataclasses.replace(truth, class_repeats=None)
    assert truth.content_hash() == once.content_hash()


@pytest.mark.parametrize("case", sorted(TWICE_ENTRIES))
def test_a_category_given_twice_counts_twice_as_in_pycocotools(tmp_path, case):
    """With a regular box, pycocotools 2.0.11 evaluates the category once per entry of
    its ``np.unique(sorted(catIds))`` (identical columns) and counts it that often in
    each of its 12 means: every number equal here (the class is one row of the
    per-class output, its AP pycocotools' column; the counts and protocol record name
    how often and why). The VOC protocols, whose devkit scores each class once, list
    it once and average each class once (common practice: the mean over classes)."""
    entries = TWICE_ENTRIES[case]
    split, detections, twice = _twice_given(case)
    _with_a_regular_box(split, detections, twice)
    reference, columns = _reference_columns(tmp_path, split, detections, twice, entries)
    assert np.all(columns >= 0)
    for k in range(1, entries):  # pycocotools' own outcome: the same column again
        assert np.array_equal(columns[..., k], columns[..., 0])
    truth, ours = _run(tmp_path, split, detections)
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    name = "t" if case == "equal_apart" else "n"
    assert list(ours["per_class"]) == list(truth.classes) and truth.classes.count(name) == 1
    assert ours["per_class"][name]["AP"] == pytest.approx(np.mean(columns[..., 0]), abs=1e-12)
    assert ours["counts"]["classes_repeated"]["classes"] == {name: entries}
    assert ours["protocol_record"]["repeated_classes"] == {name: entries}
    once = dataclasses.replace(truth, class_repeats=None)
    assert truth.content_hash() != once.content_hash()  # the numbers differ: so does the hash
    _, voc = _run(tmp_path, split, detections, "voc")
    assert "classes_repeated" not in voc["counts"]
    assert "repeated_classes" not in voc["protocol_record"]
    ap = [row["AP"] for row in voc["per_class"].values() if row["AP"] is not None]
    assert list(voc["per_class"]) == list(truth.classes)
    assert voc["summary"]["AP"] == pytest.approx(np.mean(ap), abs=1e-12)


@pytest.mark.parametrize("protocol", ["coco", "recall40"])
def test_a_category_given_twice_counts_alike_on_every_path(files, tmp_path, protocol):
    """Six classes, NaN listed twice beside 2^64, every class with regular boxes: the
    whole file (equal to pycocotools 2.0.11 under ``coco``), the streamed per-shard
    pieces, the image shards merged, and the class groups (the platform's path, three
    groups) give the same records, scorecard and counts; so do a cached load and the
    records file's slice scores."""
    split, dets = _class_split([2**64, NAN, 1, 2, 3, 4])
    split["categories"].append({"id": NAN, "name": "again"})
    truth, predictions = files.load(split, dets)
    repeats = dict(zip(truth.classes, truth.class_repeats.tolist()))
    assert repeats == {**dict.fromkeys(truth.classes, 1), "again": 2}
    gt, dt = files.root / "truth.json", files.root / "predictions.json"
    if protocol == "coco":
        reference = pycocotools_eval(gt, dt)
        assert sum(1 for c in reference.params.catIds if c != c) == 2
        ours = evaluate(truth, predictions, "coco")
        for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
            assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12)
    whole = match(truth, predictions, protocol)
    assert whole.class_repeats.tolist() == truth.class_repeats.tolist()
    tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
    expected = annotate(
        score_records(whole, protocol, tag_masks=tag_masks), truth, predictions, whole, protocol
    )
    assert expected["counts"]["classes_repeated"]["classes"] == {"again": 2}
    result, _, merged = _grouped(truth, predictions, protocol, 1, 3, tmp_path)
    _same_records(whole, merged)
    assert merged.class_repeats.tolist() == truth.class_repeats.tolist()
    assert json.dumps(result) == json.dumps(expected)
    assert json.dumps(slice_scores(merged, protocol)) == json.dumps(slice_scores(whole, protocol))

    ranges = shards.plan(truth.n_images, 1)
    (tmp_path / "pieces").mkdir()
    streamed = stream_pieces(dt, truth, ranges, tmp_path / "pieces")
    pieces = [shards.load_piece(path) for path in streamed.paths]
    records = shards.merge(
        [(shards.match_shard(*piece, protocol), piece[1]) for piece in pieces], truth.n_boxes
    )
    _same_records(whole, records)
    again = annotate(
        score_records(records, protocol, tag_masks=tag_masks), truth, streamed.counts,
        records, protocol,
    )  # fmt: skip
    assert json.dumps(again) == json.dumps(expected)

    for cache in (tmp_path / "cache", tmp_path / "cache"):  # build, then read
        cached = load_truth(gt, cache_dir=cache)
        assert cached.class_repeats.tolist() == truth.class_repeats.tolist()
        assert cached.content_hash() == truth.content_hash()
        assert json.dumps(evaluate(cached, predictions, protocol)) == json.dumps(
            evaluate(truth, predictions, protocol)
        )
