"""Every rule reads one answer to "which ids does the reference's ``np.unique`` lose".

pycocotools 2.0.11 and the CityPersons script (``eval_MR_multisetup.py``) both run
``p.imgIds = list(np.unique(p.imgIds))`` and ``p.catIds = list(np.unique(p.catIds))`` in
``evaluate`` and then look images and categories up by those numpy values; what numpy
rounds or cuts is never looked up (``loaders.ids.unique_lost``). The engine decides that
once, on the ground truth (``GroundTruth.unique_lost_masks``/``looked_up``), and every
rule reads it: the matching, the boolean-score refusals, the city-scale refusals and the
city-scale FPPI. Each check runs pycocotools 2.0.11 itself or the transliteration of the
CityPersons script (``pedestrian_oracle.cityscale_script``, which now runs the same
``np.unique`` lines).
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from evaluation.engine import COCO_SUMMARY_KEYS, InputError, evaluate, load_predictions, load_truth
from evaluation.engine.__main__ import main
from evaluation.engine.level_samples import LevelSamples, setup_class
from evaluation.engine.loaders.ids import unique_lost, unique_merged
from evaluation.engine.pedestrian import evaluate_setups_with_samples

from .conftest import as_reference, pycocotools_eval
from .load_paths import as_pycocotools, every_path_agrees
from .test_cityscale_booleans import _agree
from .test_cityscale_raises import _ann, _dataset, _det, _write
from .test_unique_lost_ids import KINDS, NAN, TEXT, _class_split, _distinct, _run

BIG = 2**53 + 1  # float64 rounds it to 2^53 (round half to even): from numpy's rules


# F1: a category listed twice -------------------------------------------------------


def test_listed_categories_keep_their_repeats_and_types():
    """``getCatIds()`` is the categories as listed: ``1`` then ``1.0`` makes the list a
    float64 array beside ``2^53 + 1``, which is then lost; the dict keys alone (``1``,
    ``2^53 + 1``: int64) lose nothing."""
    distinct = [1, BIG]
    assert unique_lost(distinct).tolist() == []
    assert unique_lost(distinct, [1, 1.0, BIG]).tolist() == [1]


@pytest.mark.parametrize("protocol", ["coco", "recall40"])
def test_a_category_listed_twice_decides_numpys_type_as_in_pycocotools(tmp_path, protocol):
    """Category 1 listed as ``1`` and again as ``1.0`` beside category ``2^53 + 1``:
    pycocotools 2.0.11 loses the big one (its AP is -1, out of the mean); so do we,
    under ``coco`` (every number equal to pycocotools) and ``recall40`` (the same
    numbers as the split without that class)."""
    split, detections = _class_split([1, BIG])
    split["categories"].insert(1, {"id": 1.0, "name": "class 0"})
    truth, ours = _run(tmp_path, split, detections, protocol)
    assert truth.unique_lost_classes.tolist() == [1]
    assert ours["counts"]["classes_left_out"]["classes"] == 1
    assert ours["counts"]["classes_left_out"]["ids"] == [str(BIG)]  # text: exact in any reader
    assert ours["per_class"]["class 1"]["AP"] is None
    if protocol == "coco":
        reference = pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
        assert int(reference.params.catIds[-1]) == 2**53  # pycocotools' own np.unique
        assert np.all(reference.eval["precision"][:, :, 1, 0, 2] == -1)  # lost there
        for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
            assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12)
        precision = reference.eval["precision"][:, :, 0, 0, 2]
        assert ours["per_class"]["class 0"]["AP"] == pytest.approx(np.mean(precision))
        return
    alone, alone_dets = _class_split([1])
    (tmp_path / "alone").mkdir()
    _, expected = _run(tmp_path / "alone", alone, alone_dets, protocol)
    assert ours["summary"] == expected["summary"]


# F3: booleans beside a lost image's number -----------------------------------------


def _bool_beside_lost(image_ids):
    """One box per image; the first image's only detection scores ``true``, the lost
    image's scores 0.5. pycocotools never joins the lost image's list, so it joins
    ``[True]`` alone and ``-dtScores`` raises."""
    split = {
        "images": [{"id": i, "width": 200, "height": 200} for i in image_ids],
        "categories": [{"id": 1, "name": "car"}],
        "annotations": [
            {"id": n + 1, "image_id": i, "category_id": 1, "bbox": [10, 10, 20, 20]}
            for n, i in enumerate(image_ids)
        ],
    }
    split["annotations"] = [{**a, "area": 400, "iscrowd": 0} for a in split["annotations"]]
    detections = [
        {"image_id": image_ids[0], "category_id": 1, "bbox": [10, 10, 20, 20], "score": True},
        {"image_id": image_ids[1], "category_id": 1, "bbox": [10, 10, 20, 20], "score": 0.5},
    ]
    return split, detections


@pytest.mark.parametrize("protocol", ["coco", "recall40"])
def test_a_lost_images_number_does_not_save_booleans_from_pycocotools(tmp_path, protocol):
    """pycocotools 2.0.11 raises (TypeError: numpy boolean negative) where the only
    number of the class sits on an image its ``np.unique`` loses; refused here,
    naming the boolean record. With the second image looked up (id 7) it scores."""
    split, detections = _bool_beside_lost([0.5, BIG])
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    with pytest.raises(TypeError, match="boolean"):
        pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
    with pytest.raises(InputError) as error:
        _run(tmp_path, split, detections, protocol)
    assert error.value.record == "record 0" and error.value.field == "score"
    split, detections = _bool_beside_lost([0.5, 7])
    reference = pycocotools_eval_written(tmp_path, split, detections)
    _, ours = _run(tmp_path, split, detections, "coco")
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12)


def pycocotools_eval_written(tmp_path, split, detections):
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    return pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")


# F2: the CityPersons script loses the same images -----------------------------------


def _cityscale_case(images, lost_hit=True):
    """Category 1 on every image: a box and a hit on the last image, a box and a far
    false positive elsewhere; ``lost_hit``: the image whose id numpy rounds holds the
    only other hit."""
    annotations, results = [], []
    for n, image in enumerate(images):
        annotations.append(_ann(n + 1, 0.0, image_id=image))
        results.append(_det(900.0, score=0.3 + 0.1 * n, image_id=image))
    results.append(_det(0.0, score=0.95, image_id=images[-1]))
    if lost_hit:
        results.append(_det(0.0, score=0.6, image_id=images[1]))
    return annotations, results


@pytest.mark.parametrize(
    "images, lost, merged",
    [
        ([0.5, BIG, 7], [BIG], []),  # rounded to 2^53, which no image has: evaluated empty
        ([0.5, BIG, 2**53], [BIG], [BIG]),  # rounded onto image 2^53: one entry of imgIds
        ([1, BIG, 7], [], []),  # int64: exact
    ],
)
def test_cityscale_loses_the_images_the_script_loses(tmp_path, images, lost, merged):
    """The script's miss rates (every setup, nine references) on images numpy rounds:
    the lost image's boxes and detections are never looked up, and FPPI divides by the
    entries of ``np.unique`` (a merged id is not an image there)."""
    annotations, results = _cityscale_case(images)
    gt, dt = _write(tmp_path, _dataset(annotations, images), results)
    ours = _agree(gt, dt, results)
    written = sorted(images)
    assert [written[i] for i in unique_lost(written)] == lost
    assert [written[i] for i in unique_merged(written)] == merged
    assert ours["n_images"] == len(images) - len(merged)
    truth = load_truth(gt)
    output, samples = evaluate_setups_with_samples(
        truth, load_predictions(dt, truth), "miss-rate-cityscale"
    )
    path = tmp_path / "samples.npz"
    samples.save(path, output)
    _, loaded = LevelSamples.load(path)
    for (level, name), part in loaded.parts.items():  # weights of one: the same value
        value = output["levels"][level]["classes"][name]["miss_rate"]
        assert setup_class(part, loaded.protocol, np.ones(len(images), np.int64))[1] == value


def test_cityscale_counts_the_lost_images_in_the_cli_result(tmp_path, capsys):
    """The CLI's result (``annotate_levels``) counts them with the script's reason."""
    images = [0.5, BIG, 7]
    annotations, results = _cityscale_case(images)
    gt, dt = _write(tmp_path, _dataset(annotations, images), results)
    argv = ["score", "--truth", str(gt), "--predictions", str(dt), "--format", "json"]
    assert main([*argv, "--protocol", "miss-rate-cityscale"]) == 0
    left_out = json.loads(capsys.readouterr().out)["counts"]["images_left_out"]
    assert left_out["images"] == 1 and left_out["truth_boxes"] == 1
    assert "CityPersons script" in left_out["reason"]


def test_cityscale_never_compares_a_lost_images_annotation_id(tmp_path):
    """A text annotation id numpy cannot write into ``dtm`` is refused where the script
    matches that box; on an image its ``np.unique`` loses it is never matched, and the
    script scores the file."""
    images = [0.5, BIG, 7]
    annotations, results = _cityscale_case(images)
    annotations[1]["id"] = "walker-2"
    gt, dt = _write(tmp_path, _dataset(annotations, images), results)
    _agree(gt, dt, results)
    images = [0.5, 3, 7]  # looked up: matched, and refused as the script raises
    annotations, results = _cityscale_case(images)
    annotations[1]["id"] = "walker-2"
    gt, dt = _write(tmp_path, _dataset(annotations, images), results)
    assert isinstance(_agree(gt, dt, results), InputError)


def test_cityscale_booleans_beside_a_lost_images_number(tmp_path):
    """The only number of category 1 sits on the lost image: the script joins the
    booleans alone and raises; refused here, naming the boolean record."""
    images = [0.5, BIG]
    annotations = [_ann(1, 0.0, image_id=0.5), _ann(2, 0.0, image_id=BIG)]
    results = [_det(0.0, score=True, image_id=0.5), _det(0.0, score=0.5, image_id=BIG)]
    gt, dt = _write(tmp_path, _dataset(annotations, images), results)
    error = _agree(gt, dt, results, record="record 0")
    assert isinstance(error, InputError)


@settings(
    max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=st.data(), text=st.booleans())
def test_random_image_ids_score_as_the_script(tmp_path, data, text):
    """Image ids of mixed kinds (``test_unique_lost_ids``' strategies: ints around 2^53,
    2^63 and 2^64, bools, whole, fractional and infinite floats; or text with U+0000):
    every setup's miss rates equal the transliteration's, which runs the script's
    ``np.unique`` and lookups."""
    ids = _distinct(data.draw(st.lists(TEXT if text else KINDS, min_size=2, max_size=6)))
    assume(len(ids) >= 2)
    annotations, results = _cityscale_case(ids)
    gt, dt = _write(tmp_path, _dataset(annotations, ids), results)
    ours = _agree(gt, dt, results)
    assert not isinstance(ours, Exception)


# Values pycocotools never reads: on an image or class np.unique loses ---------------


def _two_images(lost=True):
    """Image 0.5 and image 2^53 + 1 (lost beside 0.5) or 7 (looked up); one box and
    one hit on each, and a miss on 0.5."""
    other = BIG if lost else 7
    split = {
        "images": [{"id": 0.5}, {"id": other}],
        "categories": [{"id": 1, "name": "car"}],
        "annotations": [
            {"id": n + 1, "image_id": i, "category_id": 1, "bbox": [10, 10, 20, 20]}
            for n, i in enumerate((0.5, other))
        ],
    }
    split["annotations"] = [{**a, "area": 400, "iscrowd": 0} for a in split["annotations"]]
    detections = [
        {"image_id": 0.5, "category_id": 1, "bbox": [10, 10, 20, 20], "score": 0.9},
        {"image_id": other, "category_id": 1, "bbox": [10, 10, 20, 20], "score": 0.8},
        {"image_id": 0.5, "category_id": 1, "bbox": [50, 10, 20, 20], "score": 0.7},
    ]
    return split, detections


UNREAD_CASES = {
    # pycocotools reads an annotation's area and bbox only in evaluateImg/computeIoU
    "annotation area text": ("truth", "area", "big"),
    "annotation bbox short": ("truth", "bbox", [10, 10, 20]),
    "annotation bbox text inside": ("truth", "bbox", [10, 10, 20, "x"]),
    "annotation without bbox": ("truth", "bbox", None),
    # a detection's score only in evaluateImg/accumulate; extra box values never
    "detection score text": ("detections", "score", "high"),
    "detection score null": ("detections", "score", None),
    "detection score list": ("detections", "score", [1]),
    "detection bbox of five": ("detections", "bbox", [10, 10, 20, 20, 1]),
}


def _unreadable(split, detections, where, field, value):
    record = split["annotations"][1] if where == "truth" else detections[1]
    if value is None:
        record.pop(field)
    else:
        record[field] = value


@pytest.mark.parametrize("case", UNREAD_CASES)
def test_values_on_a_lost_image_are_never_read_as_in_pycocotools(
    tmp_path, files, monkeypatch, case
):
    """pycocotools 2.0.11 fetches no annotation or detection of an image its
    ``np.unique`` loses, so it never reads these values and scores the file: scored
    here too (the record left out, counted in ``unreadable_on_lost_ids``), every
    number equal; on a looked-up image (id 7) both refuse it (pycocotools raises)."""
    where, field, value = UNREAD_CASES[case]
    split, detections = _two_images()
    _unreadable(split, detections, where, field, value)
    truth, predictions = files.load(split, detections)
    gt, dt = files.write("gt-ref.json", split), files.write("dt-ref.json", detections)
    as_pycocotools(gt, dt, truth, predictions)
    counts = truth.box_counts if where == "truth" else predictions.box_counts
    assert counts["unreadable_on_lost_ids"] == 1
    if where == "detections":  # cached, sliced, validated first, streamed pieces
        every_path_agrees(tmp_path, monkeypatch, dt, truth, predictions, chunk=9)
    split, detections = _two_images(lost=False)
    _unreadable(split, detections, where, field, value)
    with pytest.raises(Exception):  # noqa: B017  pycocotools' own error, whatever it is
        pycocotools_eval(files.write("gt7.json", split), files.write("dt7.json", detections))
    with pytest.raises(InputError) as error:
        files.load(split, detections)
    assert error.value.field == field and error.value.record in ("annotations[1]", "record 1")


@pytest.mark.parametrize(
    "categories, lost, refused",
    [
        ((0.5, 1, BIG), BIG, True),  # rounded: 2^53+1 == np.float64(2^53), fetched, read
        (("a\x00", "b"), "a\x00", False),  # cut: "a\x00" != "a", never fetched (no class 1)
        ((1, NAN), NAN, False),  # numpy's NaN: another object, NaN == NaN false
    ],
)
def test_cityscale_reads_a_lost_categorys_annotations_as_the_script_fetches_them(
    tmp_path, categories, lost, refused
):
    """``_prepare`` fetches ``getAnnIds(imgIds, catIds)``, whose category test is the
    list test ``ann['category_id'] in catIds`` (``==``): a numeric id numpy rounded
    still equals its value there, so its annotations are read (a null ``vis_ratio``
    raises TypeError) though never evaluated; a text id cut of U+0000 is not fetched.
    Refused, or scored, as the script's transliteration does."""
    annotations = [_ann(1, 0.0), _ann(2, 300.0, category_id=lost, vis_ratio=None)]
    results = [_det(0.0, score=0.9), _det(600.0, score=0.5)]
    gt, dt = _write(tmp_path, _dataset(annotations, (1,), categories), results)
    outcome = _agree(gt, dt, results)
    assert isinstance(outcome, InputError) is refused
    if refused:
        assert outcome.record == "annotations[1]" and outcome.field == "vis_ratio"


def _as_pycocotools_scores(tmp_path, split, detections):
    """The split's ground truth, after checking that ``coco`` scores the file exactly
    as pycocotools 2.0.11 does (its 12 numbers)."""
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    reference = pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
    truth = load_truth(tmp_path / "gt.json")
    ours = evaluate(truth, load_predictions(tmp_path / "dt.json", truth), "coco")
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    return truth


# A repeated annotation id: only the occurrences getAnnIds fetches make a copy ---------


def _copies_case(images, categories, first_image, first_category, scored_category):
    """Annotation id 7 twice: first on ``first_image``/``first_category`` (one
    pycocotools may never fetch), last on image 5 under ``scored_category``; a hit on
    it, a miss on image 5 and a hit on the other image's box (id 8)."""

    def ann(id_, image, category, x=0):
        box = [x, 0, 10, 10]
        return {"id": id_, "image_id": image, "category_id": category, "bbox": box,
                "area": 100, "iscrowd": 0}  # fmt: skip

    other = images[0]
    split = {
        "images": [{"id": i} for i in images],
        "categories": [{"id": c, "name": f"c{n}"} for n, c in enumerate(categories)],
        "annotations": [
            ann(7, first_image, first_category),
            ann(7, 5, scored_category),
            ann(8, other, scored_category),
        ],
    }
    detections = [
        {"image_id": 5, "category_id": scored_category, "bbox": [0, 0, 10, 10], "score": 0.9},
        {"image_id": other, "category_id": scored_category, "bbox": [0, 0, 10, 10], "score": 0.8},
        {"image_id": 5, "category_id": scored_category, "bbox": [50, 0, 10, 10], "score": 0.7},
    ]
    return split, detections


@pytest.mark.parametrize(
    "images, categories, first, copies",
    [
        ((0.5, BIG, 5), (1,), (BIG, 1), 0),  # a lost image: imgToAnns[BIG] never read
        ((0.5, 5), ("a\x00", "b"), (5, "a\x00"), 0),  # cut text: "a\x00" not in catIds
        ((1, 5), (NAN, 2), (5, NAN), 0),  # NaN: not in catIds (== is false)
        ((1, 5), (0.5, BIG), (5, BIG), 1),  # rounded: BIG == np.float64(2^53), fetched
        ((1, 5), (1, 2), (5, 1), 1),  # nothing lost: fetched, a copy as ever
    ],
)
def test_a_repeated_id_makes_a_copy_only_where_pycocotools_fetches_it(
    tmp_path, images, categories, first, copies
):
    """pycocotools 2.0.11 ``loadAnns`` makes a copy of the last annotation with an id
    for each occurrence ``getAnnIds`` fetches; an occurrence on an image ``np.unique``
    loses (a dict lookup), or under a category whose lost id is not ``==`` to numpy's
    value (``in catIds``), is never fetched and makes none. Every number equals
    pycocotools' on the file, and the occurrences left out are counted."""
    scored = categories[-1]
    split, detections = _copies_case(images, categories, *first, scored)
    truth = _as_pycocotools_scores(tmp_path, split, detections)
    assert truth.box_counts["duplicate_id_copies"] == copies
    assert truth.box_counts["duplicate_ids_never_fetched"] == 1 - copies


# getAnnIds' category test: ``ann['category_id'] in catIds``, numpy's == -------------


def _fetch_case(categories, first_category, last_category, other_category):
    """Annotation id 10 twice on image 1 (first under ``first_category``, last under
    ``last_category``), id 11 on image 2; a hit on each kept box."""

    def ann(id_, image, category, box):
        return {"id": id_, "image_id": image, "category_id": category, "bbox": box,
                "area": box[2] * box[3], "iscrowd": 0}  # fmt: skip

    split = {
        "images": [{"id": 1}, {"id": 2}],
        "categories": [{"id": c, "name": f"c{n}"} for n, c in enumerate(categories)],
        "annotations": [
            ann(10, 1, first_category, [300, 300, 20, 20]),
            ann(10, 1, last_category, [10, 10, 50, 50]),
            ann(11, 2, other_category, [100, 100, 40, 40]),
        ],
    }
    detections = [
        {"image_id": 1, "category_id": last_category, "bbox": [10, 10, 50, 50], "score": 0.9},
        {"image_id": 2, "category_id": other_category, "bbox": [100, 100, 40, 40], "score": 0.8},
    ]
    return split, detections


@pytest.mark.parametrize(
    "categories, first, copies",
    [
        ((2**63, 0.5), 2**63 - 1, 1),  # float64: 2^63 - 1 == np.float64(2^63), fetched
        ((2**62 + 1, 3), 4611686018427387904.0, 1),  # int64 entries == a float: converted
        ((2**62 + 1, 3), 4611686018427387904, 0),  # int64 against an int: exact, not
        ((7, 3), 8, 0),  # no match at all: never fetched, no copy
    ],
)
def test_an_unlisted_category_numpy_finds_makes_a_copy(tmp_path, categories, first, copies):
    """pycocotools 2.0.11 ``getAnnIds`` keeps an annotation when ``ann['category_id'] in
    catIds``, numpy's values compared with ``==``: an unlisted category id numpy rounds
    or converts onto a category's value is fetched, and a repeated annotation id there
    becomes a copy of its last annotation (one box more). Every number equals
    pycocotools' on the file; the copy is counted."""
    split, detections = _fetch_case(categories, first, categories[0], categories[1])
    truth = _as_pycocotools_scores(tmp_path, split, detections)
    assert truth.box_counts["duplicate_id_copies"] == copies


@pytest.mark.parametrize("image, refused", [(1, True), (3, False)])
def test_an_integer_numpy_cannot_compare_with_boolean_categories(tmp_path, image, refused):
    """Categories all ``true``: ``np.unique`` makes a boolean array, and ``2**64 in``
    it raises OverflowError in pycocotools 2.0.11's ``getAnnIds``, which tests the
    annotations of the images it looks up only: refused naming the annotation where it
    raises (image 1), scored with its numbers where it never tests it (image 3, not
    listed)."""
    split, detections = _fetch_case((True,), True, True, True)
    split["annotations"].append(
        {
            "id": 12,
            "image_id": image,
            "category_id": 2**64,
            "bbox": [0, 0, 30, 30],
            "area": 900,
            "iscrowd": 0,
        }  # fmt: skip
    )
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    if refused:
        with pytest.raises(OverflowError):
            pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
        with pytest.raises(InputError, match="OverflowError") as error:
            load_truth(tmp_path / "gt.json")
        assert (error.value.record, error.value.field) == ("annotations[3]", "category_id")
        return
    _as_pycocotools_scores(tmp_path, split, detections)


def _uncomparable_detection(image_ids, image, category):
    """Categories all ``true`` (``_fetch_case``) on images ``image_ids``, and a
    detection of the unlisted ``category`` on image ``image`` (record 2)."""
    split, detections = _fetch_case((True,), True, True, True)
    moved = dict(zip((1, 2), image_ids))
    split["images"] = [{"id": i} for i in image_ids]
    for item in (*split["annotations"], *detections):
        item["image_id"] = moved[item["image_id"]]
    detections.append({"image_id": image, "category_id": category, "bbox": [0, 0, 9, 9],
                       "score": 0.3})  # fmt: skip
    return split, detections


@pytest.mark.parametrize(
    "image_ids, image, category, refused",
    [
        ((1, 2), 1, 2**64, True),
        ((1, 2), 2, 2**63, True),  # uint64 range: no C long either
        ((1, 2), 1, -(2**63) - 1, True),
        ((1, 2), 2, 2**63 - 1, False),  # int64: compared (False), left out
        ((2**63 + 1, 5), 2**63 + 1, 2**64, False),  # a lost image: never looked up
        ((2**63 + 1, 5), 5, 2**64, True),
    ],
)
def test_a_detection_numpy_cannot_compare_with_boolean_categories(
    tmp_path, monkeypatch, image_ids, image, category, refused
):
    """pycocotools 2.0.11's ``_prepare`` runs ``cocoDt.getAnnIds(imgIds, catIds)`` too:
    with every category id a boolean, ``ann['category_id'] in catIds`` raises
    OverflowError on a detection whose category is an integer numpy cannot convert, on
    any image it looks up (not one whose id its ``np.unique`` loses). Refused naming the
    record and ``category_id`` by every load path (whole file, slices of a few bytes,
    a cached load, the blocks ``stream_predictions`` yields, the streamed pieces); else
    left out as any unlisted class, every number pycocotools'."""
    from evaluation.engine.loaders import results_stream, stream_predictions
    from evaluation.engine.pieces import stream_pieces
    from evaluation.engine.shards import plan

    split, detections = _uncomparable_detection(image_ids, image, category)
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    gt, dt = tmp_path / "gt.json", tmp_path / "dt.json"
    if not refused:
        pycocotools_eval(gt, dt)  # no error
        truth = _as_pycocotools_scores(tmp_path, split, detections)
        assert load_predictions(dt, truth).dropped == 1
        return
    with pytest.raises(OverflowError):
        pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    (tmp_path / "pieces").mkdir()
    loads = [
        lambda: load_predictions(dt, truth),
        lambda: load_predictions(dt, truth, cache_dir=tmp_path / "cache"),
        lambda: list(stream_predictions(dt, truth)),
        lambda: stream_pieces(dt, truth, plan(truth.n_images, 1), tmp_path / "pieces"),
    ]
    for chunk in (None, 7):
        if chunk:
            monkeypatch.setattr(results_stream, "CHUNK_BYTES", chunk)
        for load in loads:
            with pytest.raises(InputError, match="OverflowError") as error:
                load()
            assert (error.value.record, error.value.field) == ("record 2", "category_id")
