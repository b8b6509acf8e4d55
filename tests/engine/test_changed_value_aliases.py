"""Records written with the value pycocotools' ``np.unique`` changed a lost id into.

pycocotools 2.0.11's ``COCOeval.evaluate`` looks images and categories up by the values
``list(np.unique(...))`` gives, in dicts that hold every annotation and detection of the
file, listed or not (``imgToAnns``, ``_gts``, ``_dts``). Where numpy changes a listed id
L into a value C no listed id has (images ``[2^63 + 1, 5]``: 2^63; categories ``[0.5,
2^53 + 1]``: 2^53; text ``"a\\x00"``: ``"a"``), the annotations of an *unlisted* image or
category written with C are scored under L's entry, and so are the detections of such a
category (``loadRes`` checks no category). The VOC devkit, KITTI's and the toolbox's
readings keep every id and leave them out, as any record of an unlisted id. Every
``coco`` check here runs pycocotools 2.0.11 itself on the very files
(``conftest.pycocotools_eval``); the other readings are checked against the engine's
own reading of the same file with those records removed (what those references read);
the CityPersons script against its transliteration (``pedestrian_oracle``). Splits and
detections are synthetic (invented, ``synthetic.py``).
"""

import copy
import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import (
    COCO_SUMMARY_KEYS,
    InputError,
    evaluate,
    load_predictions,
    load_truth,
)
from evaluation.engine.difficulty import evaluate_levels, level_counts
from evaluation.engine.loaders import json_syntax
from evaluation.engine.pedestrian import evaluate_setups, setup_counts
from evaluation.engine.pieces import stream_pieces
from evaluation.engine.shards import load_piece, plan

from . import pedestrian_oracle
from .conftest import as_reference, pycocotools_eval
from .load_paths import COLUMNS, every_path_agrees
from .synthetic import make_detections, make_split
from .test_class_groups import N_CLASSES, whole_and_grouped
from .test_stream_pieces import _reference, _same_piece

NAMES = ["car", "pedestrian", "cyclist", "van", "truck", "tram"]  # KITTI's names: kitti2d
KINDS = ("wide images", "text images", "float categories", "text categories")


def _changed(kind, n, old):
    """``(written, changed value)`` of id ``old`` (position ``n``): every third one is
    written so that numpy changes it (a float64 array: ints in [2^63, 2^64) beside
    small ones round to multiples of 2048, ints beyond 2^53 beside 0.5 to even; a
    ``<U`` array cuts a trailing U+0000), the value it becomes; the others are written
    as they read (changed value None)."""
    if kind == "float categories" and n == 0:
        return 0.5, None  # makes the array float64
    if n % 3 != 1:
        return (f"im{old}" if kind == "text images" else f"c{old}" if "text" in kind else old), None
    if kind == "wide images":
        value = 2**63 + 4096 * (n + 1)
        return value + 1, value
    if kind == "float categories":
        value = 2**53 + 4 * (n + 1)
        return value + 1, value  # 2^53 + 4m + 1 rounds to even: 2^53 + 4m
    text = f"im{old}" if kind == "text images" else f"c{old}"
    return text + "\x00", text


def _aliased(kind, seed=7):
    """``(split, detections, the alias annotations' and detections' positions)``: a
    6-class split whose every third image (category) id numpy changes, with
    annotations — and, for categories, detections near them — of the unlisted id
    written with the changed value (crowd regions, small, medium and large areas, a
    crowd-only entry included); the lost entries keep records of their own."""
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=12, n_classes=N_CLASSES, boxes_per_image=4, crowd_rate=0.1)
    dets = make_detections(rng, split, score_levels=8)
    for n, category in enumerate(split["categories"]):
        category["name"] = NAMES[n]
    images = "images" in kind
    family = split["images"] if images else split["categories"]
    field = "image_id" if images else "category_id"
    written, values = {}, {}
    for n, entry in enumerate(family):
        new, value = _changed(kind, n, entry["id"])
        written[entry["id"]] = new
        if value is not None:
            values[entry["id"]] = value
        entry["id"] = new
    for record in (*split["annotations"], *dets):
        record[field] = written[record[field]]
    anns, extra_dets = [], []
    next_id = max(a["id"] for a in split["annotations"]) + 1
    lost = list(values)
    for j, old in enumerate(lost):
        for k in range(3 + j):
            x, y = 20.0 + 90 * k, 30.0 + 40 * j
            size = [6.0, 40.0, 120.0][k % 3]  # small, medium and large areas
            ann = {
                "id": next_id,
                "bbox": [x, y, size, size * 0.8],
                "area": size * size * 0.8,
                "iscrowd": int(k == 2),
            }
            if images:
                ann.update(image_id=values[old], category_id=1 + (k + j) % N_CLASSES)
            else:
                image = split["images"][(k + j) % len(split["images"])]["id"]
                ann.update(image_id=image, category_id=values[old])
                score = 0.3 + 0.1 * ((k + j) % 5)
                extra_dets.append(
                    {**{f: ann[f] for f in ("image_id", "category_id")}, "score": score}
                    | {"bbox": [x + 1, y, size, size * 0.8]}
                )
                if k == 0:  # a false alarm there too
                    extra_dets.append({**extra_dets[-1], "bbox": [400.0, 400.0, 30, 30]})
            anns.append(ann)
            next_id += 1
    crowd_only = {  # an entry whose only alias box is a crowd region (red team F5)
        "id": next_id,
        "bbox": [300.0, 300.0, 50.0, 50.0],
        "area": 2500.0,
        "iscrowd": 1,
    }
    if images:
        crowd_only.update(image_id=values[lost[-1]], category_id=N_CLASSES)
    else:
        crowd_only.update(image_id=split["images"][-1]["id"], category_id=values[lost[-1]])
        extra_dets.append({**crowd_only, "score": 0.95, "bbox": [305.0, 305.0, 40.0, 40.0]})
        del extra_dets[-1]["id"], extra_dets[-1]["area"], extra_dets[-1]["iscrowd"]
    anns.append(crowd_only)
    n_anns, n_dets = len(split["annotations"]), len(dets)
    split["annotations"] += anns
    dets += extra_dets
    return split, dets, range(n_anns, len(split["annotations"])), range(n_dets, len(dets))


def _without(split, dets, ann_rows, det_rows):
    """The files with the alias records removed: what the VOC, KITTI and toolbox
    readings read (an annotation or detection of an unlisted id is left out)."""
    split = copy.deepcopy(split)
    split["annotations"] = [a for n, a in enumerate(split["annotations"]) if n not in ann_rows]
    return split, [d for n, d in enumerate(dets) if n not in det_rows]


def _write(tmp_path, split, dets, name=""):
    gt, dt = tmp_path / f"gt{name}.json", tmp_path / f"dt{name}.json"
    gt.write_text(json.dumps(split))
    dt.write_text(json.dumps(dets))
    return gt, dt


def _equal_pycocotools(ours, truth, reference):
    """The 12 numbers, and per class (``params.catIds``' positions: the engine's class
    order) AP, AP50 and recall at area ``all`` and 100 detections."""
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    assert len(reference.params.catIds) == len(truth.classes)
    for k, name in enumerate(truth.classes):
        precision = reference.eval["precision"][:, :, k, 0, 2]
        row = ours["per_class"][name]
        if np.all(precision == -1):
            assert row["AP"] is None, name
            continue
        assert row["AP"] == pytest.approx(np.mean(precision), abs=1e-12), name
        assert row["AP50"] == pytest.approx(np.mean(precision[0]), abs=1e-12), name
        recall = reference.eval["recall"][:, k, 0, 2]
        assert row["recall"] == pytest.approx(np.mean(recall), abs=1e-12), name


@pytest.mark.parametrize("kind", KINDS)
def test_scored_under_the_lost_entry_as_pycocotools_scores_them(tmp_path, kind):
    """pycocotools 2.0.11 on the file: every summary number and per-class AP, AP50 and
    recall equal; its numbers differ from those of the file without the alias records
    (so they are scored there), and the result counts them as scored."""
    split, dets, ann_rows, det_rows = _aliased(kind)
    gt, dt = _write(tmp_path, split, dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    ours = evaluate(truth, predictions, "coco")
    reference = pycocotools_eval(gt, dt)
    _equal_pycocotools(ours, truth, reference)
    without = pycocotools_eval(*_write(tmp_path, *_without(split, dets, ann_rows, det_rows), "-"))
    assert not np.array_equal(reference.eval["precision"], without.eval["precision"])
    entry = ours["counts"]["under_changed_value"]
    assert (entry["truth_boxes"], entry["detections"]) == (len(ann_rows), len(det_rows))
    assert entry["scored"] is True
    assert truth.box_counts["annotations_under_changed_value"] == len(ann_rows)
    assert "images" in kind or ours["counts"]["classes_left_out"]["truth_boxes"] == int(
        np.isin(truth.box_class, truth.unique_lost_classes).sum() - len(ann_rows)
    )


@pytest.mark.parametrize("kind", KINDS)
def test_the_other_readings_leave_them_out(tmp_path, kind):
    """``voc``, ``voc07``, KITTI's levels (``kitti2d``) and the toolbox's miss rate read
    the file as they read it without the alias records (those references keep every id
    and leave out every record of an unlisted one): the same numbers; the result says
    they were left out."""
    split, dets, ann_rows, det_rows = _aliased(kind)
    truth = load_truth(_write(tmp_path, split, dets)[0])
    predictions = load_predictions(tmp_path / "dt.json", truth)
    gt, dt = _write(tmp_path, *_without(split, dets, ann_rows, det_rows), "-")
    truth_without = load_truth(gt)
    without = load_predictions(dt, truth_without)
    for protocol in ("voc", "voc07"):
        ours, theirs = (
            evaluate(truth, predictions, protocol),
            evaluate(truth_without, without, protocol),
        )
        assert json.dumps(ours["summary"]) == json.dumps(theirs["summary"]), protocol
        assert json.dumps(ours["per_class"]) == json.dumps(theirs["per_class"]), protocol
        assert ours["counts"]["under_changed_value"]["scored"] is False
    ours, theirs = evaluate_levels(truth, predictions), evaluate_levels(truth_without, without)
    assert json.dumps(ours) == json.dumps(theirs)
    ours = evaluate_setups(truth, predictions, "miss-rate")
    assert json.dumps(ours) == json.dumps(evaluate_setups(truth_without, without, "miss-rate"))
    assert setup_counts(truth) == setup_counts(truth_without)  # the split page's counts
    assert level_counts(truth) == level_counts(truth_without)


@pytest.mark.parametrize("kind", ["wide images", "float categories", "text categories"])
@pytest.mark.parametrize("protocol", ["coco", "voc", "recall40"])
def test_every_path_gives_the_whole_files_numbers(tmp_path, monkeypatch, kind, protocol):
    """The truth read a few bytes at a time and from the cache (written, then read):
    the same alias boxes, hash and numbers; the detections read in slices, validated
    first, cached and streamed into shard pieces: the same columns (alias flags too)
    and counts; image shards and class groups (the platform's path): the same records
    and result as the whole file."""
    split, dets, _, _ = _aliased(kind)
    gt, dt = _write(tmp_path, split, dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    expected = json.dumps(evaluate(truth, predictions, protocol))
    with monkeypatch.context() as m:
        m.setattr(json_syntax, "CHUNK_BYTES", 256)
        for cache in (None, tmp_path / "cache", tmp_path / "cache"):
            again = load_truth(gt, cache_dir=cache)
            assert again.alias.tobytes() == truth.alias.tobytes()
            assert again.content_hash() == truth.content_hash()
            assert json.dumps(evaluate(again, predictions, protocol)) == expected
    with monkeypatch.context() as m:
        every_path_agrees(tmp_path, m, dt, truth, predictions, 512, (*COLUMNS, "alias"))
    ranges = plan(truth.n_images, 5)
    work = tmp_path / "streamed"
    work.mkdir()
    _, reference = _reference(dt, truth, ranges, tmp_path)
    for k, path in enumerate(stream_pieces(dt, truth, ranges, work).paths):
        _same_piece(load_piece(path), reference[k])
    _, whole, result, _ = whole_and_grouped(truth, predictions, protocol, 5, 3, tmp_path)
    assert json.dumps(result) == json.dumps(whole)
    assert json.dumps(whole) == expected


def test_the_hash_covers_the_alias_boxes(tmp_path):
    """A split with alias boxes hashes otherwise than the same split without them and
    than one whose alias boxes differ; the split without them keeps the hash it had
    (no alias column is hashed where there is none)."""
    split, dets, ann_rows, det_rows = _aliased("wide images")
    truth = load_truth(_write(tmp_path, split, dets)[0])
    plain, _ = _without(split, dets, ann_rows, det_rows)
    truth_without = load_truth(_write(tmp_path, plain, [], "-")[0])
    assert truth_without.alias is None
    moved = copy.deepcopy(split)
    moved["annotations"][ann_rows[0]]["bbox"][0] += 1
    hashes = {truth.content_hash(), truth_without.content_hash()}
    hashes.add(load_truth(_write(tmp_path, moved, [], "-moved")[0]).content_hash())
    assert len(hashes) == 3


def _class_files(tmp_path, extra_dets):
    """Categories ``[0.5, 2^53 + 1]`` (float64: 2^53 + 1 -> 2^53) on two images, a box
    of category 2^53 (unlisted) on image 1, and ``extra_dets`` of category 2^53."""
    split = {
        "images": [{"id": i, "width": 640, "height": 480} for i in (1, 2)],
        "categories": [{"id": 0.5, "name": "car"}, {"id": 2**53 + 1, "name": "van"}],
        "annotations": [
            {"id": n + 1, "image_id": image, "category_id": category, "bbox": [x, x, 40, 40]}
            | {"area": 1600, "iscrowd": 0}
            for n, (image, category, x) in enumerate(
                [(1, 0.5, 10), (2, 2**53 + 1, 9), (1, 2**53, 100)]
            )
        ],
    }
    dets = [{"image_id": 1, "category_id": 0.5, "bbox": [10, 10, 40, 40], "score": 0.8}]
    return _write(tmp_path, split, dets + extra_dets)


@pytest.mark.parametrize("beyond", [False, True])
def test_an_unfit_alias_detection_is_refused_only_where_pycocotools_compares_it(tmp_path, beyond):
    """A detection of category 2^53 with a five-number box: pycocotools' ``computeIoU``
    raises on it among the 100 it compares in its image and entry (refused, naming the
    record); ranked below 100 others there it never reads it and scores the file
    (scored here too, the record left out and counted). A text score it reads on
    every detection of the entry (``-d['score']``): refused wherever it is."""
    near = {"image_id": 1, "category_id": 2**53, "bbox": [100, 100, 40, 40]}
    ahead = [{**near, "score": 0.9} for _ in range(100 if beyond else 0)]
    unfit = {**near, "bbox": [100, 100, 40, 40, 1], "score": 0.5}
    gt, dt = _class_files(tmp_path, [*ahead, unfit])
    truth = load_truth(gt)
    if beyond:
        reference = pycocotools_eval(gt, dt)
        predictions = load_predictions(dt, truth)
        _equal_pycocotools(evaluate(truth, predictions, "coco"), truth, reference)
        assert predictions.box_counts["uncompared_unfit"] == 1
    else:
        with pytest.raises(Exception):  # noqa: B017  pycocotools' own error, whatever it is
            pycocotools_eval(gt, dt)
        with pytest.raises(InputError) as error:
            load_predictions(dt, truth)
        assert error.value.record == "record 1"
    gt, dt = _class_files(tmp_path, [*ahead, {**near, "score": "high"}])
    with pytest.raises(Exception):  # noqa: B017
        pycocotools_eval(gt, dt)
    with pytest.raises(InputError) as error:
        load_predictions(dt, truth)
    assert (error.value.record, error.value.field) == (f"record {1 + len(ahead)}", "score")


def test_boolean_alias_scores_are_refused_where_pycocotools_raises(tmp_path):
    """The entry of 2^53 + 1 holds image 1 only (its own box on image 2, written 2^53 +
    1, is never found): its one detection scoring ``true`` makes ``accumulate`` join
    booleans alone and negate them (TypeError). Refused under ``coco``; the VOC
    reading leaves that detection out and scores the file."""
    gt, dt = _class_files(
        tmp_path, [{"image_id": 1, "category_id": 2**53, "bbox": [100, 100, 40, 40], "score": True}]
    )
    with pytest.raises(TypeError):
        pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    with pytest.raises(InputError, match="boolean") as error:
        evaluate(truth, predictions, "coco")
    assert error.value.record == "record 1"
    assert evaluate(truth, predictions, "voc")["counts"]["under_changed_value"]["detections"] == 1
    gt, dt = _class_files(
        tmp_path, [{"image_id": 1, "category_id": 2**53, "bbox": [100, 100, 40, 40], "score": 1.0}]
    )
    _equal_pycocotools(
        evaluate(truth, load_predictions(dt, truth), "coco"), truth, pycocotools_eval(gt, dt)
    )


def test_an_alias_box_beyond_float64_is_refused_where_pycocotools_reads_it(tmp_path):
    """An annotation of image 2^63 (scored under 2^63 + 1) whose box holds an integer
    beyond float64: pycocotools' ``computeIoU`` converts it and raises OverflowError
    (refused under ``coco``, naming it); the VOC reading leaves it out and scores."""
    split = {
        "images": [{"id": i, "width": 640, "height": 480} for i in (2**63 + 1, 5)],
        "categories": [{"id": 1, "name": "car"}],
        "annotations": [
            {"id": 1, "image_id": 5, "category_id": 1, "bbox": [1, 1, 9, 9], "area": 81},
            {"id": 2, "image_id": 2**63, "category_id": 1, "bbox": [1, 1, 10**400, 9]},
        ],
    }
    for ann in split["annotations"]:
        ann |= {"iscrowd": 0, "area": 81}
    dets = [{"image_id": 5, "category_id": 1, "bbox": [1, 1, 9, 9], "score": 0.9}]
    gt, dt = _write(tmp_path, split, dets)
    with pytest.raises(OverflowError):
        pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    with pytest.raises(InputError, match="OverflowError") as error:
        evaluate(truth, predictions, "coco")
    assert (error.value.record, error.value.field) == ("annotations[1]", "bbox")
    assert evaluate(truth, predictions, "voc")["per_class"]["car"]["AP"] == 1.0


def test_the_cityscale_script_scores_them_and_the_toolbox_leaves_them_out(tmp_path):
    """The CityPersons script runs the same ``np.unique`` lines and its ``_prepare``
    finds the annotations of image 2^63 under 2^63 + 1 (its transliteration's miss
    rates move with them): ``miss-rate-cityscale`` gives its numbers
    (``test_changed_value_corners.py`` for more), while the toolbox (``miss-rate``)
    reads the file as without them."""
    split = {
        "images": [{"id": i, "width": 2048, "height": 1024} for i in (2**63 + 1, 5)],
        "categories": [{"id": 1, "name": "pedestrian"}],
        "annotations": [
            {"id": n + 1, "image_id": image, "category_id": 1, "bbox": [x, 0, 41, 100]}
            | {"height": 100, "vis_ratio": 1.0, "ignore": 0}
            for n, (image, x) in enumerate([(5, 10), (2**63, 300), (2**63, 600)])
        ],
    }
    dets = [{"image_id": 5, "category_id": 1, "bbox": [10, 0, 41, 100], "score": 0.9}]
    gt, dt = _write(tmp_path, split, dets)
    plain = {**split, "annotations": split["annotations"][:1]}
    script = pedestrian_oracle.cityscale_coco(split, dets, 0)
    assert script != pedestrian_oracle.cityscale_coco(plain, dets, 0)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    city = evaluate_setups(truth, predictions, "miss-rate-cityscale")["levels"]["reasonable"]
    assert city["miss_rate"] == script[0]
    assert city["classes"]["pedestrian"]["reference_miss_rate"] == script[1]
    gt2, dt2 = _write(tmp_path, plain, dets, "-")
    truth_without = load_truth(gt2)
    ours = evaluate_setups(truth, predictions, "miss-rate")
    assert json.dumps(ours) == json.dumps(
        evaluate_setups(truth_without, load_predictions(dt2, truth_without), "miss-rate")
    )


IMAGE_IDS = st.sampled_from([2**63 + 1, 2**63 + 2049, 3, 5, 7])
CATEGORY_IDS = st.sampled_from([0.5, 2**53 + 1, 2**53 + 5, 2, 3])


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=st.data())
def test_random_small_files_equal_pycocotools(tmp_path, data):
    """Random listed image and category ids (some numpy changes, some merge), boxes on
    listed, unlisted and changed-value ids (crowd or not, of three sizes), detections
    on listed images of listed, unlisted and changed-value categories: pycocotools
    2.0.11's numbers, per class too."""
    # 2^63 + 1 beside 3 and 2^53 + 1 beside 0.5 are always lost (changed into 2^63, 2^53)
    images = [2**63 + 1, 3, *data.draw(st.lists(IMAGE_IDS, max_size=2))]
    images = sorted(set(images), key=str)
    categories = [0.5, 2**53 + 1, *data.draw(st.lists(CATEGORY_IDS, max_size=2))]
    categories = sorted(set(categories), key=str)
    image_refs = st.sampled_from([*images, 2**63, 2**63 + 2048, 9])
    category_refs = st.sampled_from([*categories, 2**53, 2**53 + 4, 4])
    box = st.tuples(st.integers(0, 3), st.sampled_from([4, 30, 100]))
    anns = [(2**63, 0.5, (0, 30), False), (3, 2**53, (1, 30), False)]  # one of each family
    anns += data.draw(
        st.lists(st.tuples(image_refs, category_refs, box, st.booleans()), max_size=8)
    )
    det_images = st.sampled_from(images)
    det_list = st.lists(st.tuples(det_images, category_refs, box, st.integers(1, 9)), max_size=8)
    split = {
        "images": [{"id": i, "width": 640, "height": 480} for i in images],
        "categories": [{"id": c, "name": f"k{n}"} for n, c in enumerate(categories)],
        "annotations": [
            {"id": n + 1, "image_id": i, "category_id": c, "iscrowd": int(crowd)}
            | {"bbox": [10 + 50 * x, 10, s, s], "area": s * s}
            for n, (i, c, (x, s), crowd) in enumerate(anns)
        ],
    }
    dets = [
        {"image_id": i, "category_id": c, "bbox": [11 + 50 * x, 10, s, s], "score": r / 10}
        for i, c, (x, s), r in [(3, 2**53, (1, 30), 5), *data.draw(det_list)]
    ]
    gt, dt = _write(tmp_path, split, dets)
    reference = pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    assert truth.alias is not None
    _equal_pycocotools(evaluate(truth, load_predictions(dt, truth), "coco"), truth, reference)


def test_a_csv_file_names_classes_not_ids(tmp_path):
    """pycocotools reads no CSV: a detections CSV's unknown label is dropped as before
    on a split with a lost category (no changed value read into a class name)."""
    gt, _ = _class_files(tmp_path, [])
    truth = load_truth(gt)
    path = tmp_path / "dt.csv"
    path.write_text(
        "image_id,label,x_min,y_min,x_max,y_max,score\n"
        "1,car,10,10,50,50,0.8\n1,9007199254740992,1,1,9,9,0.5\n"
    )
    predictions = load_predictions(path, truth)
    assert (len(predictions), predictions.dropped, predictions.alias) == (1, 1, None)
