"""Annotation ids given more than once (red team audit12 F3): pycocotools' family reads
each as a copy of the last annotation with that id, every reference that never reads
ids reads each as the file gives it.

Checked against: pycocotools 2.0.11 run in the test (``coco``); the VOC devkit
transliteration ``oracle.voc_ap`` (``VOCevaldet.m``/``VOCap.m``, written from the
published code's logic; it never reads ids) on the file read as given (``voc``,
``voc07``); the pedestrian toolbox transliteration ``pedestrian_oracle.toolbox``
(``miss-rate``, ``miss-rate-caltech``) and the CityPersons script's
``pedestrian_oracle.cityscale_coco`` (whose ``_prepare`` runs ``loadAnns``: the copies,
``miss-rate-cityscale``). KITTI's levels (``kitti2d``) are checked against the same
file with its ids made unique (its devkit reads label files, never ids), which
``test_difficulty.py`` checks against the devkit's transliteration.
"""

import copy
import json

import numpy as np
import pytest

from evaluation.engine import evaluate, export, load_predictions, load_truth
from evaluation.engine.difficulty import evaluate_levels, level_counts
from evaluation.engine.level_provenance import annotate_levels
from evaluation.engine.loaders import json_syntax
from evaluation.engine.pedestrian import evaluate_setups, setup_counts
from evaluation.engine.pieces import stream_pieces
from evaluation.engine.shards import load_piece, plan

from . import oracle, pedestrian_oracle
from .conftest import as_reference, pycocotools_eval
from .load_paths import COLUMNS, every_path_agrees
from .test_class_groups import N_CLASSES, whole_and_grouped
from .test_stream_pieces import _reference, _same_piece

COCO_SUMMARY_KEYS = (
    "AP",
    "AP50",
    "AP75",
    "AP_small",
    "AP_medium",
    "AP_large",
    "AR1",
    "AR10",
    "AR100",
    "AR_small",
    "AR_medium",
    "AR_large",
)
SETUPS = ("reasonable", "small", "heavy", "all")
SEEDS = range(12)

#: The audit's converter-style file (ids restart on each image) and its perfect
#: detector; ``content_hash`` as engine 2.20.3 gave it (run on main before this change:
#: a split frozen then must verify; the ``heights`` hash since engine 2.22.0, whose
#: ``repeats`` hash holds the annotations as given, ``test_hash_repeats.py``).
CONVERTER = {
    "images": [{"id": 1, "width": 100, "height": 100}, {"id": 2, "width": 100, "height": 100}],
    "categories": [{"id": 1, "name": "a"}, {"id": 2, "name": "b"}],
    "annotations": [
        {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 20, 20], "area": 400},
        {"id": 2, "image_id": 1, "category_id": 2, "bbox": [50, 50, 20, 20], "area": 400},
        {"id": 1, "image_id": 2, "category_id": 1, "bbox": [5, 5, 30, 30], "area": 900},
        {"id": 2, "image_id": 2, "category_id": 2, "bbox": [60, 60, 10, 10], "area": 100},
    ],
}
for _a in CONVERTER["annotations"]:
    _a["iscrowd"] = 0
CONVERTER_HASH = "59f3e929a5b371e8cddb38ce3586f081d00e3b6187a8bae16bb5768182f68f69"
#: ``content_hash`` of ``_random_split(seed)`` under engine 2.20.3 (main before this
#: change), for the seeds listed: the ``heights`` hash since engine 2.22.0.
RANDOM_HASHES = {
    0: "3d0141df28dbfd3e0677b0960f9458f00b9dee7abf9479f8175a98c439ede337",
    1: "335bd459c518021409fc845f63976a70f985adc6f58032d1cec9641b9b366755",
    2: "e303f085f16aca34474f88af44fdb7a92e22d147f34516a40abe43c949ec646b",
    3: "9fa9dbfd05cf1d00e2675ac9fd69e3240d4c8ad86dba059315306477ab8abdb5",
    4: "81fe5ff01725f3d6b1b983b8dcd7ce565f65b3ffe5f58d02234f132ca3e5044b",
    5: "50ef5aa69f54e14641aad0bd96d5724b49b9cc80245b42a6b24ec73a728c7a86",
    6: "5c5768833f55eaeedb53cff74640a22b0ae8226cc6f4cfe33906f057cf293491",
    7: "5ec7401818851c1f6920d86d628aa0c8bd29419050dd2aeaa1f13524e92f0100",
    8: "93cc7747cde339cba4700f697a2503bb7ab68cc33fc44956962e527911e3b4ce",
    9: "d5a1d43030ce3014c222815a913df7f99f5383d6991afdd4a299d18d8ef6998e",
    10: "19f807b72ea3ffab7955a2e3cc61384253b04cb2a9bd54f269abb89b1df88dc3",
    11: "5af310853d2aeb5e887415925b9180dd7ea9f22d8a4ff93cac33763b9f59912c",
}


def _perfect(split):
    return [
        {
            "image_id": a["image_id"],
            "category_id": a["category_id"],
            "bbox": a["bbox"],
            "score": 0.9,
        }
        for a in split["annotations"]
    ]


def _random_split(seed, pedestrians=False, n_classes=2):
    """Images whose annotation ids restart on each image, or are drawn from a few
    values (so an id repeats within an image and across images), some boxes tall enough
    for the pedestrian setups; detections near some boxes, on every image."""
    rng = np.random.default_rng(seed)
    n_images = int(rng.integers(2, 7))
    images = [
        {"id": i + 1, "width": 2048, "height": 1024, "tags": ["day" if i % 2 else "night"]}
        for i in range(n_images)
    ]
    names = ["pedestrian"] if pedestrians else ["car", "pedestrian"]
    names += [f"class {k}" for k in range(len(names), n_classes)]
    categories = [{"id": k + 1, "name": name} for k, name in enumerate(names)]
    restart = bool(rng.integers(2))
    annotations, dets = [], []
    for image in images:
        for j in range(int(rng.integers(1, 5))):
            x, y = (float(v) for v in rng.integers(0, 400, 2))
            w, h = float(rng.integers(10, 60)), float(rng.integers(20, 200))
            ann = {
                "id": j + 1 if restart else int(rng.integers(1, 5)),
                "image_id": image["id"],
                "category_id": int(rng.integers(1, len(names) + 1)),
                "bbox": [x, y, w, h],
                "area": w * h,
                "iscrowd": 0,
            }
            if pedestrians:
                ann |= {"height": h, "vis_ratio": 1.0, "ignore": 0}
            else:  # KITTI's levels read them
                ann |= {"occlusion": int(rng.integers(0, 3)), "truncation": 0.25 * (j % 3)}
            annotations.append(ann)
            if rng.random() < 0.7:
                shift = float(rng.integers(-3, 4))
                box = [x + shift, y, w, h]
                dets.append(
                    {
                        "image_id": image["id"],
                        "category_id": ann["category_id"],
                        "bbox": box,
                        "score": round(float(rng.random()), 3),
                    }
                )
        x, y = (float(v) for v in rng.integers(0, 400, 2))
        dets.append(
            {
                "image_id": image["id"],
                "category_id": 1,
                "bbox": [x, y, 30.0, 80.0],
                "score": round(float(rng.random()), 3),
            }
        )
    if not restart and len({a["id"] for a in annotations}) == len(annotations):
        annotations[-1]["id"] = annotations[0]["id"]  # some id repeats
    split = {"images": images, "categories": categories, "annotations": annotations}
    return split, dets


def _unique(split):
    """The file with every annotation id made unique: what a reference that never
    reads ids reads (each annotation as given)."""
    split = copy.deepcopy(split)
    for n, ann in enumerate(split["annotations"]):
        ann["id"] = n + 1
    return split


def _write(tmp_path, split, dets, name=""):
    gt, dt = tmp_path / f"gt{name}.json", tmp_path / f"dt{name}.json"
    gt.write_text(json.dumps(split))
    dt.write_text(json.dumps(dets))
    return gt, dt


def _load(tmp_path, split, dets, name=""):
    gt, dt = _write(tmp_path, split, dets, name)
    truth = load_truth(gt)
    return truth, load_predictions(dt, truth)


def _repeats(split):
    ids = [a["id"] for a in split["annotations"]]
    return len(set(ids)) < len(ids)


def _equal_pycocotools(ours, truth, reference):
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    for k, name in enumerate(truth.classes):
        precision = reference.eval["precision"][:, :, k, 0, 2]
        row = ours["per_class"][name]
        if np.all(precision == -1):
            assert row["AP"] is None, name
            continue
        assert row["AP"] == pytest.approx(np.mean(precision), abs=1e-12), name


def _equal_devkit(ours, truth, predictions, eleven_point):
    """Per-class AP against ``oracle.voc_ap`` (the devkit transliteration) run on the
    file read as given (``truth``, ``predictions``: its ids made unique)."""
    expected = oracle.voc_ap(truth, predictions, eleven_point=eleven_point)
    for k, name in enumerate(truth.classes):
        got = ours["per_class"][name]["AP"]
        if np.isnan(expected[k]):
            assert got is None, name
        else:
            assert got == pytest.approx(expected[k], abs=1e-12), name


def test_the_converter_file_scores_as_the_devkit_and_as_pycocotools(tmp_path):
    """The audit's case: a perfect detector gives voc07 and voc AP 1.0 per class (the
    devkit transliteration, which never reads ids; was 0.2727 and 0.25), ``coco`` still
    pycocotools 2.0.11's 0.2525; the counts say which reading each used; the hash is
    the one engine 2.20.3 gave (scheme ``heights``)."""
    truth, predictions = _load(tmp_path, CONVERTER, _perfect(CONVERTER))
    assert truth.content_hash("heights") == CONVERTER_HASH != truth.content_hash()
    unique, unique_dets = _load(tmp_path, _unique(CONVERTER), _perfect(CONVERTER), "-u")
    for protocol, eleven in (("voc07", True), ("voc", False)):
        ours = evaluate(truth, predictions, protocol)
        _equal_devkit(ours, unique, unique_dets, eleven)
        assert ours["per_class"]["a"]["AP"] == pytest.approx(1.0, abs=1e-15)
        assert ours["counts"]["repeated_ids"]["read"] == "as given"
        assert ours["counts"]["truth_boxes"] == 4
    ours = evaluate(truth, predictions, "coco")
    reference = pycocotools_eval(*_write(tmp_path, CONVERTER, _perfect(CONVERTER), "-p"))
    _equal_pycocotools(ours, truth, reference)
    assert reference.stats[0] == pytest.approx(0.2525, abs=1e-4)
    assert ours["counts"]["repeated_ids"] == {
        "copies": 2,
        "as_given": 2,
        "read": "copies",
        "reason": ours["counts"]["repeated_ids"]["reason"],
    }
    assert ours["counts"]["truth_boxes"] == 4
    assert truth.box_counts["duplicate_id_copies"] == 2
    assert truth.n_boxes_read() == 4  # the split's box count: pycocotools' rows
    for protocol, ids in (("coco", ["1", "1", "2", "2"]), ("voc", ["1", "1", "2", "2"])):
        _, records = evaluate(truth, predictions, protocol, return_records=True)
        rows = [
            (image, box)
            for block in export.row_blocks(records, truth)
            for row, image, box in zip(block["row"], block["image_id"], block["box_id"])
            if row == "box"
        ]
        assert sorted(str(box) for _, box in rows) == ids, protocol
        # pycocotools: both copies of id 1 on image 2 (the last); as given: one per image
        images = sorted(str(image) for image, box in rows if str(box) == "1")
        assert images == (["2", "2"] if protocol == "coco" else ["1", "2"]), protocol


@pytest.mark.parametrize("seed", SEEDS)
def test_random_files_equal_every_reference(tmp_path, seed):
    """Random files with repeated ids: ``coco`` equals pycocotools 2.0.11, ``voc`` and
    ``voc07`` the devkit transliteration on the file read as given, ``kitti2d`` and the
    split page's counts the file with unique ids."""
    split, dets = _random_split(seed)
    assert _repeats(split)
    truth, predictions = _load(tmp_path, split, dets)
    reference = pycocotools_eval(*_write(tmp_path, split, dets, "-p"))
    _equal_pycocotools(evaluate(truth, predictions, "coco"), truth, reference)
    unique, unique_dets = _load(tmp_path, _unique(split), dets, "-u")
    for protocol, eleven in (("voc07", True), ("voc", False)):
        ours = evaluate(truth, predictions, protocol)
        _equal_devkit(ours, unique, unique_dets, eleven)
        theirs = evaluate(unique, unique_dets, protocol)
        assert json.dumps(ours["per_class"]) == json.dumps(theirs["per_class"]), protocol
        assert json.dumps(ours["summary"]) == json.dumps(theirs["summary"]), protocol
    ours, theirs = evaluate_levels(truth, predictions), evaluate_levels(unique, unique_dets)
    assert json.dumps(ours) == json.dumps(theirs)
    assert level_counts(truth) == level_counts(unique)
    if seed in RANDOM_HASHES:
        assert truth.content_hash("heights") == RANDOM_HASHES[seed] != truth.content_hash()


def _toolbox_scene(split, dets):
    """The file as the toolbox transliteration reads it (every annotation as given)."""
    scene = []
    for image in split["images"]:
        gt = [(*a["bbox"], None, 0) for a in split["annotations"] if a["image_id"] == image["id"]]
        dt = [(*d["bbox"], d["score"]) for d in dets if d["image_id"] == image["id"]]
        scene.append((gt, dt))
    return scene


@pytest.mark.parametrize("seed", SEEDS)
def test_the_miss_rates_read_each_as_their_reference(tmp_path, seed):
    """``miss-rate`` and ``miss-rate-caltech`` equal the toolbox transliteration on every
    annotation as given; ``miss-rate-cityscale`` the CityPersons script's (pycocotools'
    copies, its ``_prepare`` running ``loadAnns``); the setup counts of the split page
    are those of the file with unique ids."""
    split, dets = _random_split(seed, pedestrians=True, n_classes=1)
    assert _repeats(split)
    truth, predictions = _load(tmp_path, split, dets)
    scene = _toolbox_scene(split, dets)
    for protocol, caltech in (("miss-rate", False), ("miss-rate-caltech", True)):
        result = evaluate_setups(truth, predictions, protocol)
        for setup in SETUPS:
            expected, miss = pedestrian_oracle.toolbox(scene, setup, caltech=caltech)
            row = result["levels"][setup]["classes"]["pedestrian"]
            if expected is None:
                assert row["miss_rate"] is None, (protocol, setup)
                continue
            assert row["miss_rate"] == pytest.approx(expected, rel=1e-12), (protocol, setup)
            assert row["reference_miss_rate"] == pytest.approx(miss, abs=1e-15)
    result = evaluate_setups(truth, predictions, "miss-rate-cityscale")
    for setup in SETUPS:
        mean_s, miss = pedestrian_oracle.cityscale_coco(
            split, dets, pedestrian_oracle.SETUP_IDS[setup]
        )
        row = result["levels"][setup]["classes"]["pedestrian"]
        if miss is None:
            assert row["miss_rate"] is None, setup
            continue
        assert row["miss_rate"] == pytest.approx(mean_s, rel=1e-12), setup
        assert row["reference_miss_rate"] == pytest.approx(miss, abs=1e-15), setup
    unique = load_truth(_write(tmp_path, _unique(split), [], "-u")[0])
    assert setup_counts(truth) == setup_counts(unique)
    for protocol, read, boxes in (
        ("miss-rate", "as given", len(split["annotations"])),
        ("miss-rate-cityscale", "copies", truth.box_counts["duplicate_id_copies"]),
    ):
        output = evaluate_setups(truth, predictions, protocol)
        counts = annotate_levels(output, protocol, truth, predictions)["counts"]
        assert counts["repeated_ids"]["read"] == read, protocol
        if read == "as given":
            assert counts["truth_boxes"] == boxes
        else:
            assert counts["repeated_ids"]["copies"] == boxes


@pytest.mark.parametrize("protocol", ["coco", "voc", "voc07"])
def test_every_path_gives_the_whole_files_numbers(tmp_path, monkeypatch, protocol):
    """The truth read a few bytes at a time and from the cache (written, then read): the
    same marks, hash and numbers; the detections read in slices, cached and streamed
    into shard pieces: the same columns; image shards and class groups (the platform's
    path) and tag slices: the same records and result as the whole file."""
    split, dets = _random_split(3, n_classes=N_CLASSES)  # as test_class_groups' helper
    split["annotations"] += copy.deepcopy(CONVERTER["annotations"])
    assert _repeats(split)
    gt, dt = _write(tmp_path, split, dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    expected = json.dumps(evaluate(truth, predictions, protocol))
    with monkeypatch.context() as m:
        m.setattr(json_syntax, "CHUNK_BYTES", 256)
        for cache in (None, tmp_path / "cache", tmp_path / "cache"):
            again = load_truth(gt, cache_dir=cache)
            assert again.repeated.tobytes() == truth.repeated.tobytes()
            assert again.content_hash() == truth.content_hash()
            assert json.dumps(evaluate(again, predictions, protocol)) == expected
    with monkeypatch.context() as m:
        every_path_agrees(tmp_path, m, dt, truth, predictions, 512, COLUMNS)
    ranges = plan(truth.n_images, 2)
    work = tmp_path / "streamed"
    work.mkdir()
    _, reference = _reference(dt, truth, ranges, tmp_path)
    for k, path in enumerate(stream_pieces(dt, truth, ranges, work).paths):
        _same_piece(load_piece(path), reference[k])
    _, whole, result, _ = whole_and_grouped(truth, predictions, protocol, 2, 2, tmp_path)
    assert json.dumps(result) == json.dumps(whole)
    assert json.dumps(whole) == expected


def test_a_file_without_repeated_ids_is_unmarked(tmp_path):
    """No id repeats: no mark, no count, the columns as before."""
    split, dets = _random_split(1)
    truth, predictions = _load(tmp_path, _unique(split), dets)
    assert truth.repeated is None
    assert "repeated_ids" not in evaluate(truth, predictions, "voc")["counts"]
