"""COCO-style JSON ids of every kind pycocotools accepts, against pycocotools 2.0.11.

pycocotools keys its dicts by the JSON values themselves (``COCO.createIndex``), so an
id may be text or any number, ``1``, ``1.0`` and ``true`` are one id and the text
``"1"`` another; it sorts image and category ids (``COCOeval.__init__``:
``sorted(cocoGt.getImgIds())``, then ``np.unique`` in ``evaluate``), which decides the
order of tied detections across images; it never sorts annotation ids, and writes a
matched one into a float array (``dtm[tind, dind] = gt[m]['id']``), so ``"0"`` is read
as 0 there. Every number below is compared with pycocotools run on the same two files.
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import evaluate, load_predictions, load_truth
from evaluation.engine.errors import InputError

from .synthetic import make_detections, make_split
from .test_coco_reference import _compare

#: Any code points, "" and U+0000 included (an id ending in it is an image pycocotools'
#: ``np.unique`` loses, left out here too: ``test_unique_lost_ids.py``).
TEXT_IDS = st.text(max_size=4)
NUMBER_IDS = st.floats(allow_nan=False)  # whole ones, subnormals, 1e308, +-inf


def _unique(draw, strategy, n):
    return draw(st.lists(strategy, min_size=n, max_size=n, unique=True))


def _restyle(draw, split, detections, styles):
    """The split and detections with their ids replaced in the drawn styles."""
    image_style, class_style, box_style = styles
    old_images = [im["id"] for im in split["images"]]
    if image_style == "text":
        new_images = _unique(draw, TEXT_IDS, len(old_images))
    elif image_style == "digits":  # text that sorts unlike the numbers: "10" < "9"
        new_images = [str(i) for i in old_images]
    else:
        new_images = _unique(draw, NUMBER_IDS, len(old_images))
    image_map = dict(zip(old_images, new_images))
    old_classes = [c["id"] for c in split["categories"]]
    if class_style == "text":
        new_classes = _unique(draw, TEXT_IDS, len(old_classes))
    elif class_style == "number":
        new_classes = _unique(draw, NUMBER_IDS, len(old_classes))
    else:
        new_classes = old_classes
    class_map = dict(zip(old_classes, new_classes))
    for image in split["images"]:
        image["id"] = image_map[image["id"]]
    for category in split["categories"]:
        category["id"] = class_map[category["id"]]
    earlier = []
    for a, ann in enumerate(split["annotations"]):
        ann["image_id"] = image_map[ann["image_id"]]
        if draw(st.integers(0, 9)) == 0:  # the other type: an image the split lacks
            new = ann["image_id"]
            ann["image_id"] = 1 if isinstance(new, str) else str(new)
        ann["category_id"] = class_map[ann["category_id"]]
        if box_style == "text":  # numeric text: pycocotools' float array takes it
            ann["id"] = draw(st.sampled_from([str(ann["id"]), f" {ann['id']}", "0", "0.0"]))
        elif box_style == "mixed":
            ann["id"] = ann["id"] if a % 2 else str(ann["id"])
        if earlier and draw(st.integers(0, 9)) == 0:  # a repeated id: the last one wins
            ann["id"] = draw(st.sampled_from(earlier))
        earlier.append(ann["id"])
    if draw(st.booleans()):  # listed twice: pycocotools' index keeps the last entry
        split["images"].append(dict(split["images"][-1]))
        split["categories"].append({**split["categories"][0], "name": "listed again"})
    for det in detections:
        det["image_id"] = image_map[det["image_id"]]
        # a class the split lacks keeps its int id: of the other type in a text family
        det["category_id"] = class_map.get(det["category_id"], det["category_id"])


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_images=st.integers(1, 12),
    styles=st.tuples(
        st.sampled_from(["text", "digits", "number"]),
        st.sampled_from(["int", "text", "number"]),
        st.sampled_from(["int", "text", "mixed"]),
    ),
    data=st.data(),
)
def test_ids_of_any_json_type_score_like_pycocotools(tmp_path, seed, n_images, styles, data):
    """Text, fractional and infinite ids in every id field, tied scores across images:
    all 12 numbers and every per-class AP, AP50, AP75 and recall equal pycocotools."""
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=n_images, n_classes=3, boxes_per_image=3, crowd_rate=0.1)
    detections = make_detections(
        rng, split, hit_rate=0.8, false_per_image=2.0, score_levels=3, extra_class_rate=0.1
    )
    if not detections:  # the reference cannot load an empty result list
        detections = [{"image_id": split["images"][0]["id"], "category_id": 1,
                       "bbox": [1.0, 1.0, 5.0, 5.0], "score": 0.5}]  # fmt: skip
    _restyle(data.draw, split, detections, styles)
    _compare(tmp_path, split, detections)


def _tied_pair(image_ids):
    """Two images, one box each; a true and a false detection tied at 0.9 on each, the
    false one on the image that sorts first: the order of images decides the AP."""
    first, second = image_ids
    box, elsewhere = [10, 10, 20, 20], [100, 100, 20, 20]
    split = {
        "images": [{"id": first}, {"id": second}],
        "categories": [{"id": 1, "name": "car"}],
        "annotations": [
            {"id": 1, "image_id": first, "category_id": 1, "bbox": box, "area": 400, "iscrowd": 0},
            {"id": 2, "image_id": second, "category_id": 1, "bbox": box, "area": 400, "iscrowd": 0},
        ],  # fmt: skip
    }
    detections = [
        {"image_id": i, "category_id": 1, "bbox": b, "score": 0.9}
        for i, b in ((first, elsewhere), (second, box), (first, box))
    ]
    return split, detections


@pytest.mark.parametrize(
    "ids",
    [
        ("10", "9"),  # text sorts by code point: "10" first
        (10, 9),  # numbers by value: 9 first
        (2.5, 2.25),
        ("b", "B"),
        ("a\x00b", "a"),
    ],
)
def test_tied_detections_follow_pycocotools_order_of_images(tmp_path, ids):
    """The same two images under ids that sort differently: AP follows the reference's
    order of the ids (the detection on the image sorted first is ranked first)."""
    split, detections = _tied_pair(ids)
    ours, reference = _compare(tmp_path, split, detections)
    assert ours["summary"]["AP50"] == pytest.approx(reference.stats[1], abs=1e-12)


@pytest.mark.parametrize(
    "ids, shown",
    [
        (("a\x00", "a"), ['"a"', '"a\\u0000"']),  # JSON-quoted: numpy text would cut it
        ((2**53 + 1, 0.5), ["0.5", str(2**53 + 1)]),
    ],
    ids=["text ending in U+0000", "2^53 + 1 beside a fraction"],
)
def test_ids_pycocotools_loses_in_np_unique_are_left_out(tmp_path, ids, shown):
    """pycocotools 2.0.11's ``np.unique`` of the id list makes a numpy text array, which
    cuts a trailing U+0000, or, beside a fraction, a float64 array, in which 2^53 + 1
    becomes 2^53; either way the first image is never looked up there and drops out of
    its evaluation. Here too (counted in ``counts.images_left_out``): the reference, and
    our result, equal our result without that image."""
    from .conftest import pycocotools_eval

    split, detections = _tied_pair(ids)
    truth, predictions = _loaded(tmp_path, split, detections)
    ours = evaluate(truth, predictions)
    reference = pycocotools_eval(tmp_path / "gt.json", tmp_path / "dt.json")
    split["images"] = split["images"][1:]
    split["annotations"] = split["annotations"][1:]
    without = evaluate(*_loaded(tmp_path, split, detections[1:2]))
    assert reference.stats[0] == pytest.approx(without["summary"]["AP"], abs=1e-12)
    assert truth.image_ids.tolist() == shown
    assert ours["summary"] == without["summary"]
    assert ours["counts"]["images_left_out"]["images"] == 1


def test_the_order_of_text_ids_changes_the_number(tmp_path):
    """The check above has teeth: "10"/"9" and 10/9 give different AP50 (worked out by
    hand: the FP ranks first on the image sorted first, so precision at the first TP is
    1/2 for one order and 1/1 for the other)."""
    as_text, _ = _compare(tmp_path, *_tied_pair(("10", "9")))
    as_numbers, _ = _compare(tmp_path, *_tied_pair((10, 9)))
    assert as_text["summary"]["AP50"] != as_numbers["summary"]["AP50"]


def _write(tmp_path, split, detections):
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    return tmp_path / "gt.json", tmp_path / "dt.json"


def test_an_id_matches_only_its_own_type(tmp_path):
    """The text "1" is not the number 1 (pycocotools' dicts): a detection of image 1 on
    a split of text ids is refused naming the record, as ``loadRes`` refuses it; a
    detection of category 1 where the category is "1" is of a class the split does not
    list (left out and counted by default, as pycocotools never scores it)."""
    split, detections = _tied_pair(("1", "2"))
    split["categories"][0]["id"] = "1"
    for ann in split["annotations"]:
        ann["category_id"] = "1"
    gt, dt = _write(tmp_path, split, [{**detections[0], "image_id": 1}])
    with pytest.raises(InputError, match=r"record 0: field 'image_id': image 1 is not in"):
        load_predictions(dt, load_truth(gt))
    _, dt = _write(tmp_path, split, detections)
    predictions = load_predictions(dt, load_truth(gt))
    assert predictions.dropped == 3 and predictions.dropped_classes == ("1",)


#: Annotation ids pycocotools 2.0.11 writes into its float ``dtm`` (Python's ``float``
#: reads the text; null is NaN, true 1) and ones it raises on when matched.
WRITABLE_IDS = ["nan", "-1", "inf", " 2 ", "1_0", "\u0661", "-0", "0", None, True, 2.5]
UNWRITABLE_IDS = ["x", "null", "", "1\x00", pytest.param(10**400, id="10**400")]


@pytest.mark.parametrize("box_id", WRITABLE_IDS)
def test_annotation_ids_numpy_writes_score_like_pycocotools(tmp_path, box_id):
    """A matched annotation whose id numpy writes into pycocotools' float ``dtm``
    scores as pycocotools 2.0.11 scores it (run: ``_compare``)."""
    split, detections = _tied_pair((1, 2))
    split["annotations"][0]["id"] = box_id
    _compare(tmp_path, split, detections)


@pytest.mark.parametrize("box_id", UNWRITABLE_IDS)
@pytest.mark.parametrize("crowd", [0, 1])
def test_matched_annotation_ids_numpy_cannot_write_are_refused(tmp_path, capsys, box_id, crowd):
    """pycocotools 2.0.11 raises (``evaluateImg``: ``dtm[tind, dind] = gt[m]['id']``,
    run here) where a detection matches an annotation whose id numpy cannot write into a
    float array — a crowd region too: refused under ``coco`` naming file, record and
    field (CLI exit 2); unmatched, or under ``recall40``/``voc`` (which read no ids),
    it scores; the same split with the box left unmatched equals pycocotools."""
    from evaluation.engine.__main__ import main

    from .conftest import pycocotools_eval

    split, detections = _tied_pair((1, 2))
    split["annotations"][1]["id"] = box_id
    split["annotations"][1]["iscrowd"] = crowd
    gt, dt = _write(tmp_path, split, detections)
    with pytest.raises((ValueError, OverflowError)):
        pycocotools_eval(gt, dt)
    truth, predictions = _loaded(tmp_path, split, detections)
    with pytest.raises(InputError) as error:
        evaluate(truth, predictions, "coco")
    assert error.value.record == "annotations[1]" and error.value.field == "id"
    assert error.value.path == str(gt)
    for protocol in ("recall40", "voc"):
        evaluate(truth, predictions, protocol)
    assert main(["score", "--truth", str(gt), "--predictions", str(dt)]) == 2
    err = capsys.readouterr().err
    assert "annotations[1]" in err and "'id'" in err and "Traceback" not in err
    unmatched = [d for d in detections if d["image_id"] != 2]
    _compare(tmp_path, split, unmatched)


def _loaded(tmp_path, split, detections):
    gt, dt = _write(tmp_path, split, detections)
    truth = load_truth(gt)
    return truth, load_predictions(dt, truth)


@pytest.mark.parametrize(
    "images, message",
    [
        ([{"id": 1}, {"id": "2"}], r"images\[1\]: field 'id': image ids mix numbers and text"),
    ],
)
def test_ids_pycocotools_cannot_sort_are_refused_naming_the_record(tmp_path, images, message):
    """pycocotools' ``sorted(getImgIds())`` raises TypeError on text mixed with numbers.
    (A NaN id is scored as pycocotools scores it: ``test_unique_lost_ids``.)"""
    split = {"images": images, "categories": [{"id": 1, "name": "car"}], "annotations": []}
    (tmp_path / "gt.json").write_text(json.dumps(split))
    with pytest.raises(InputError, match=message):
        load_truth(tmp_path / "gt.json")


def test_ids_are_shown_and_exported_as_written(tmp_path):
    """The split keeps its ids as written, in pycocotools' order; the records export
    writes each image id back as its JSON value."""
    from evaluation.engine import export

    split, detections = _tied_pair(("img 10", "img 9"))
    split["images"].append({"id": "a\x00"})
    truth, predictions = _loaded(tmp_path, split, detections)
    assert truth.image_id_type == "json"  # numpy text would cut the U+0000
    assert [json.loads(i) for i in truth.image_ids] == ["a\x00", "img 10", "img 9"]
    split, detections = _tied_pair((2.5, 10**20))
    truth, predictions = _loaded(tmp_path, split, detections)
    assert truth.image_ids.tolist() == ["2.5", "100000000000000000000"]
    _, records = evaluate(truth, predictions, "coco", return_records=True)
    rows = [json.loads(line) for line in "".join(export.jsonl_chunks(records, truth)).split("\n")
            if line]  # fmt: skip
    assert {row["image_id"] for row in rows} == {2.5, 10**20}


def test_csv_detections_name_number_ids_by_their_value(tmp_path):
    """CSV has no types: against a split of JSON number ids, the text ``2.50`` names the
    image 2.5 and ``1e0`` the image 1 (Python's ``float``, as the ids' own reading)."""
    split, _ = _tied_pair((1, 2.5))
    gt, _ = _write(tmp_path, split, [])
    rows = ["image_id,label,x_min,y_min,x_max,y_max,score", "2.50,car,10,10,30,30,0.9"]
    rows.append("1e0,car,10,10,30,30,0.8")
    (tmp_path / "dt.csv").write_text("\n".join(rows) + "\n")
    truth = load_truth(gt)
    predictions = load_predictions(tmp_path / "dt.csv", truth)
    assert truth.image_ids[predictions.image].tolist() == ["2.5", "1"]
    assert evaluate(truth, predictions)["summary"]["AP50"] == pytest.approx(1.0)


def test_typed_ids_survive_the_cache_and_the_command_line(tmp_path):
    """A split of text ids read back from the columnar cache keeps its type (a number 1
    still names no image), and the CLI's JSON result and records export stay valid
    JSON with the ids as written."""
    import subprocess
    import sys

    split, detections = _tied_pair(("img/10", "img/9"))
    gt, dt = _write(tmp_path, split, detections)
    first = load_truth(gt, cache_dir=tmp_path / "cache")
    again = load_truth(gt, cache_dir=tmp_path / "cache")
    assert again.image_id_type == first.image_id_type == "text"
    assert again.image_ids.tolist() == ["img/10", "img/9"]
    (tmp_path / "other").mkdir()
    _, wrong = _write(tmp_path / "other", split, [{**detections[0], "image_id": 10}])
    with pytest.raises(InputError, match="image 10 is not in the split"):
        load_predictions(wrong, again)
    out = tmp_path / "records.jsonl"
    command = [sys.executable, "-m", "evaluation.engine", "score", "--truth", str(gt)]
    command += ["--predictions", str(dt), "--format", "json", "--records-out", str(out)]
    done = subprocess.run(command, capture_output=True, text=True, check=False)
    assert done.returncode == 0, done.stderr
    result = json.loads(done.stdout)
    assert result["counts"]["images"] == 2
    rows = [json.loads(line) for line in out.read_text().splitlines()]
    assert {row["image_id"] for row in rows} == {"img/10", "img/9"}


def test_null_references_name_nothing_as_in_pycocotools(tmp_path):
    """pycocotools 2.0.11 keys its dicts by ``None`` too: an annotation whose
    ``category_id``, ``image_id`` or ``id`` is null is left out or kept as pycocotools
    leaves or keeps it, and a detection of category null is never scored (dropped as a
    class the split does not list); all numbers equal the reference. An image whose own
    id is null is refused, naming the record."""
    split, detections = _tied_pair((1, 2))
    split["annotations"].append({**split["annotations"][0], "id": 3, "category_id": None})
    split["annotations"].append({**split["annotations"][0], "id": 4, "image_id": None})
    split["annotations"][1]["id"] = None
    detections.append({**detections[0], "category_id": None})
    ours, _ = _compare(tmp_path, split, detections)
    assert ours["counts"]["dropped_predictions"] == 1
    assert ours["counts"]["boxes"]["truth"]["annotations_of_unlisted_images"] == 1
    split["images"][1]["id"] = None
    (tmp_path / "gt.json").write_text(json.dumps(split))
    with pytest.raises(InputError, match=r"images\[1\]: field 'id': image ids cannot be null"):
        load_truth(tmp_path / "gt.json")
    (tmp_path / "dt.json").write_text(json.dumps([{**detections[0], "image_id": None}]))
    split["images"][1]["id"] = 2
    (tmp_path / "gt.json").write_text(json.dumps(split))
    with pytest.raises(InputError, match=r"record 0: field 'image_id': image null is not in"):
        load_predictions(tmp_path / "dt.json", load_truth(tmp_path / "gt.json"))
