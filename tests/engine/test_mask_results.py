"""Results given as compressed RLE masks (``segmentation``, no ``bbox``), against
pycocotools 2.0.11: ``maskUtils.area`` / ``toBbox`` for the RLE arithmetic
(``loaders/rle.py``) and ``COCO.loadRes`` + ``COCOeval(..., 'bbox')`` for the scores,
the refusals and the whole-file / streamed / sharded paths.
"""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pycocotools import mask as mask_utils

from evaluation.engine import InputError, evaluate, load_predictions, load_truth
from evaluation.engine.loaders import rle
from evaluation.engine.provenance import protocol_record

from .conftest import pycocotools_eval
from .synthetic import make_detections, make_split
from .test_coco_reference import _compare


def _encode(mask):
    """pycocotools 2.0.11's own encoding of a (h, w) 0/1 mask (Fortran-ordered uint8)."""
    return mask_utils.encode(np.asfortranarray(mask.astype(np.uint8)))


def _random_mask(rng, h, w):
    kind = rng.integers(0, 4)
    if kind == 0:
        return rng.random((h, w)) < rng.random()
    m = np.zeros((h, w), bool)
    if kind == 1:
        y, x = rng.integers(0, h), rng.integers(0, w)
        m[y : y + rng.integers(0, h + 1), x : x + rng.integers(0, w + 1)] = True
    elif kind == 2:
        m[:] = rng.random() < 0.5
    else:
        m.flat[rng.integers(0, h * w, 3)] = True
    return m


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**32 - 1))
def test_decode_area_and_box_equal_pycocotools(seed):
    """``rle.decode``/``area``/``to_bbox`` against ``maskUtils.area``/``toBbox`` of
    pycocotools 2.0.11: masks it encodes, and random texts (odd counts, wrapping
    sums, values of 7 and more characters)."""
    rng = np.random.default_rng(seed)
    objs = []
    for _ in range(60):
        h, w = (int(v) for v in rng.integers(1, 30, 2))
        if rng.random() < 0.5:
            r = _encode(_random_mask(rng, h, w))
            objs.append({"size": [h, w], "counts": r["counts"].decode()})
        else:
            chars = rng.integers(48, 112, int(rng.integers(0, 25)))
            text = "".join(map(chr, chars))
            if text and (ord(text[-1]) - 48) & 0x20:
                text += "0"
            objs.append({"size": [h, int(rng.integers(0, 30))], "counts": text})
    values, n_values, unterminated = rle.decode([o["counts"] for o in objs])
    assert not unterminated.any()
    h = [o["size"][0] for o in objs]
    w = [o["size"][1] for o in objs]
    assert rle.area(values, n_values).tolist() == mask_utils.area(objs).tolist()
    assert rle.to_bbox(values, n_values, h, w).tolist() == mask_utils.toBbox(objs).tolist()


@pytest.mark.parametrize("longest_by_column", [16, 1])
def test_long_values_shift_as_pycocotools(monkeypatch, longest_by_column):
    """Values of 7+ characters: the C code's int shift by 5k, modulo 32 on x86 (the 8th
    character lands at bit 3), and the sign extension alike — pycocotools 2.0.11 run;
    read a column of characters at a time and a byte at a time (``rle._bits``)."""
    monkeypatch.setattr(rle, "_LONGEST_BY_COLUMN", longest_by_column)
    texts = ["0PPPPPP1", "0PPPPPPP1", "0PPPPPPPPPP1", "0PPPPPP?", "0PPPPPPPO", "0oooooooA"]
    texts += ["0" + "P" * 40 + "1", "0" + "o" * 20 + "?", "5" + "Xg" * 15 + "4", "12"]
    values, n_values, _ = rle.decode(texts)
    expected = [int(mask_utils.area({"size": [1, 1], "counts": t})) for t in texts]
    assert rle.area(values, n_values).astype(np.int64).tolist() == expected


def _odd_text(rng):
    """Counts text pycocotools 2.0.11 reads without raising: any characters (non-ASCII
    ones are several UTF-8 bytes, each read as a C char), a NUL ending it early; the
    last byte never says more follow (else it reads past the end)."""
    alphabet = [chr(c) for c in range(33, 127)] + ["é", "ж", "\u20ac", "\x00", "\U0001f600"]
    text = "".join(rng.choice(alphabet, int(rng.integers(0, 20))))
    last = text.split("\0", 1)[0].encode()[-1:]
    return text + "0" if last and (last[0] - 48) & 0x20 else text


def test_odd_texts_decode_as_pycocotools():
    """``rle`` against ``maskUtils.area``/``toBbox`` (pycocotools 2.0.11) on texts of
    any characters, NULs among them, and odd sizes (extra entries, floats, booleans
    are its callers' business: here whole heights and widths, 1..2^40)."""
    rng = np.random.default_rng(7)
    objs = []
    for _ in range(2000):
        h, w = (int(v) for v in rng.integers(1, 2**40, 2))
        if rng.random() < 0.5:
            h, w = (int(v) for v in rng.integers(1, 40, 2))
        objs.append({"size": [h, w], "counts": _odd_text(rng)})
    values, n_values, unterminated = rle.decode([o["counts"] for o in objs])
    assert not unterminated.any()
    h = [o["size"][0] for o in objs]
    w = [o["size"][1] for o in objs]
    # one mask a call, as loadRes calls it (a list of 256 or more overflows its uint8)
    assert rle.area(values, n_values).tolist() == [int(mask_utils.area(o)) for o in objs]
    expected = [mask_utils.toBbox(o).tolist() for o in objs]
    assert rle.to_bbox(values, n_values, h, w).tolist() == expected


def _mask_results(rng, split, scenario):
    """Detections as masks drawn inside jittered ground-truth boxes, with holes; some
    empty, some giving a box of their own (the first never), some of a size unlike
    their image's."""
    frames = {im["id"]: (im["height"], im["width"]) for im in split["images"]}
    out = []
    for i, det in enumerate(make_detections(rng, split, false_per_image=scenario["false"])):
        h, w = frames[det["image_id"]]
        if rng.random() < scenario.get("other_size", 0.0):  # read as given, not the image's
            h, w = (int(v) for v in rng.integers(1, 300, 2))
        x, y, bw, bh = (int(v) for v in det["bbox"])
        m = np.zeros((h, w), bool)
        m[y : y + max(bh, 1), x : x + max(bw, 1)] = True
        m &= rng.random((h, w)) >= scenario["holes"] * rng.random()
        if rng.random() < scenario["empty"]:
            m[:] = False
        seg = _encode(m)
        seg = {"size": [int(v) for v in seg["size"]], "counts": seg["counts"].decode()}
        record = {"image_id": det["image_id"], "category_id": det["category_id"]}
        record.update(segmentation=seg, score=det["score"])
        if i and rng.random() < scenario["with_box"]:
            record["bbox"] = det["bbox"]
        out.append(record)
    return out


mask_scenarios = st.fixed_dictionaries(
    {
        "seed": st.integers(0, 2**32 - 1),
        "n_images": st.integers(1, 8),
        "n_classes": st.integers(1, 4),
        "holes": st.sampled_from([0.0, 0.3, 0.9]),
        "empty": st.sampled_from([0.0, 0.1]),
        "with_box": st.sampled_from([0.0, 0.3]),
        "false": st.sampled_from([0.0, 3.0]),
        "other_size": st.sampled_from([0.0, 0.2]),
    }
)


@settings(
    max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(mask_scenarios)
def test_masks_score_as_pycocotools(tmp_path, scenario):
    """Every summary number and per-class AP/AP50/AP75/recall (and per size bucket)
    equal pycocotools 2.0.11's on files of RLE masks without boxes (some with boxes,
    some empty; masks' areas unlike their boxes', so size ranges differ from w*h)."""
    rng = np.random.default_rng(scenario["seed"])
    split = make_split(
        rng,
        n_images=scenario["n_images"],
        n_classes=scenario["n_classes"],
        boxes_per_image=4,
        width=int(rng.integers(60, 220)),
        height=int(rng.integers(60, 220)),
    )
    detections = _mask_results(rng, split, scenario)
    if not detections:
        return
    _compare(tmp_path, split, detections)
    truth = load_truth(tmp_path / "truth.json")
    assert load_predictions(tmp_path / "predictions.json", truth).area is not None


def _files(tmp_path, split, detections):
    gt, dt = tmp_path / "truth.json", tmp_path / "masks.json"
    gt.write_text(json.dumps(split))
    dt.write_text(json.dumps(detections))
    return gt, dt


def _small_split():
    return {
        "images": [{"id": 1, "width": 40, "height": 30}],
        "annotations": [
            {
                "id": 1,
                "image_id": 1,
                "category_id": 1,
                "bbox": [2, 3, 10, 8],
                "area": 80.0,
                "iscrowd": 0,
            }
        ],
        "categories": [{"id": 1, "name": "car"}],
    }


def _rect(h, w, y, x, bh, bw):
    m = np.zeros((h, w), bool)
    m[y : y + bh, x : x + bw] = True
    r = _encode(m)
    return {"size": [h, w], "counts": r["counts"].decode()}


def test_area_source_recorded_and_box_read_whole(tmp_path):
    """The record names the mask area; the derived box is what matching reads."""
    dets = [
        {"image_id": 1, "category_id": 1, "segmentation": _rect(30, 40, 3, 2, 8, 10), "score": 0.9}
    ]
    gt, dt = _files(tmp_path, _small_split(), dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    assert predictions.boxes.tolist() == [[2.0, 3.0, 10.0, 8.0]]
    assert predictions.area.tolist() == [80.0]
    result = evaluate(truth, predictions, "coco")
    assert result["summary"]["AP"] == pytest.approx(pycocotools_eval(gt, dt).stats[0])
    record = protocol_record("coco", truth, predictions, _records(truth, predictions), result)
    assert "mask area (RLE)" in record["area_source"]["predictions"]
    assert predictions.box_counts["mask_area"] == 1


def _records(truth, predictions):
    from evaluation.engine.matching import match

    return match(truth, predictions, "coco")


def _bad(**fields):
    return {"image_id": 1, "category_id": 1, "score": 0.5, **fields}


# (field refused, what pycocotools 2.0.11 raises — None: it crashes or reads past the
# end of the text, so it is not run —, the second result)
BAD = [
    ("segmentation", KeyError, _bad()),
    ("segmentation", TypeError, _bad(segmentation=[[1, 1, 5, 1, 5, 5]])),
    ("segmentation.counts", TypeError, _bad(segmentation={"size": [30, 40], "counts": [5, 3]})),
    ("segmentation.size", IndexError, _bad(segmentation={"size": [30], "counts": "0"})),
    ("segmentation.size", OverflowError, _bad(segmentation={"size": [-30, 40], "counts": "0"})),
    ("segmentation.size", TypeError, _bad(segmentation={"size": ["30", 40], "counts": "0"})),
    (
        "segmentation.size",
        ValueError,
        _bad(segmentation={"size": [float("nan"), 4], "counts": "0"}),
    ),
    ("segmentation.size", None, _bad(segmentation={"size": [0, 40], "counts": "0;"})),
    ("segmentation.counts", None, _bad(segmentation={"size": [30, 40], "counts": "0P"})),
    (  # Python's json reads the escape into text; pycocotools' str.encode raises
        "segmentation.counts",
        UnicodeEncodeError,
        _bad(segmentation={"size": [30, 40], "counts": "0\udc00"}),
    ),
    ("bbox", "bounding box", _bad(bbox=[], segmentation={"size": [30, 40], "counts": "0"})),
]


@pytest.mark.parametrize("field, raises, bad", BAD)
def test_what_pycocotools_refuses_is_refused(tmp_path, field, raises, bad):
    """A second result pycocotools 2.0.11 cannot read (loadRes, maskUtils or computeIoU
    raise; toBbox divides by a zero height) is refused naming file, record 1 and field;
    each case pycocotools survives is run through it (it raises as listed)."""
    first = _bad(segmentation=_rect(30, 40, 3, 2, 8, 10), score=0.9)
    gt, dt = _files(tmp_path, _small_split(), [first, bad])
    if isinstance(raises, str):
        with pytest.raises(Exception, match=raises):  # computeIoU's plain Exception
            pycocotools_eval(gt, dt)
    elif raises is not None:
        with pytest.raises(raises):
            pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    with pytest.raises(InputError) as error:
        load_predictions(dt, truth)
    assert error.value.record == "record 1" and error.value.field == field
    assert str(dt) in str(error.value)


def test_first_result_with_an_empty_box(tmp_path):
    """``bbox: []`` on the first result: loadRes takes the segmentation reading but
    keeps the empty box, and computeIoU raises on it (pycocotools 2.0.11 run); refused."""
    first = _bad(bbox=[], segmentation=_rect(30, 40, 3, 2, 8, 10), score=0.9)
    gt, dt = _files(tmp_path, _small_split(), [first])
    with pytest.raises(Exception, match="bounding box"):
        pycocotools_eval(gt, dt)
    with pytest.raises(InputError) as error:
        load_predictions(dt, load_truth(gt))
    assert error.value.record == "record 0" and error.value.field == "bbox"


def test_odd_sizes_scored_as_pycocotools(tmp_path):
    """Sizes pycocotools reads through ``int()``: a float height, a boolean, a third
    entry; a size unlike the image's; an empty counts text (the zero box, area 0)."""
    dets = [
        {"image_id": 1, "category_id": 1, "segmentation": _rect(30, 40, 3, 2, 8, 10), "score": 0.9},
        {
            "image_id": 1,
            "category_id": 1,
            "segmentation": {"size": [30.7, 40, 1], "counts": _rect(30, 40, 4, 2, 8, 10)["counts"]},
            "score": 0.8,
        },
        {
            "image_id": 1,
            "category_id": 1,
            "segmentation": {"size": [True, 40], "counts": "05"},
            "score": 0.7,
        },
        {"image_id": 1, "category_id": 1, "segmentation": _rect(12, 50, 3, 2, 8, 10), "score": 0.6},
        {
            "image_id": 1,
            "category_id": 1,
            "segmentation": {"size": [30, 40], "counts": ""},
            "score": 0.5,
        },
    ]
    gt, dt = _files(tmp_path, _small_split(), dets)
    reference = pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    result = evaluate(truth, load_predictions(dt, truth), "coco")
    from evaluation.engine import COCO_SUMMARY_KEYS

    from .conftest import as_reference

    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(result["summary"][key]) == pytest.approx(expected, abs=1e-12), key


def test_a_zero_height_mask_with_its_own_box_scores_quietly(tmp_path):
    """A mask whose height is 0 modulo 2^32 (2^32 here) keeps the box its result gives:
    pycocotools 2.0.11 computes no box for it, only the area, and scores the file; the
    engine scores it alike, without a numpy division warning."""
    import warnings

    dets = [
        {"image_id": 1, "category_id": 1, "segmentation": _rect(30, 40, 3, 2, 8, 10), "score": 0.9},
        {
            "image_id": 1,
            "category_id": 1,
            "segmentation": {"size": [2**32, 40], "counts": "05"},
            "bbox": [2, 3, 10, 8],
            "score": 0.8,
        },
    ]
    gt, dt = _files(tmp_path, _small_split(), dets)
    reference = pycocotools_eval(gt, dt)
    truth = load_truth(gt)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = evaluate(truth, load_predictions(dt, truth), "coco")
    from evaluation.engine import COCO_SUMMARY_KEYS

    from .conftest import as_reference

    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(result["summary"][key]) == pytest.approx(expected, abs=1e-12), key


def test_a_box_file_ignores_segmentations(tmp_path):
    """A first result with a box: every result is a box (area w*h), segmentations
    unread whatever they hold (polygons, lists), as loadRes does."""
    dets = [
        {
            "image_id": 1,
            "category_id": 1,
            "bbox": [2, 3, 10, 8],
            "segmentation": [[1, 2, 3]],
            "score": 0.9,
        },
        {
            "image_id": 1,
            "category_id": 1,
            "bbox": [2, 3, 9, 8],
            "segmentation": {"size": [1, 1], "counts": [1]},
            "score": 0.8,
        },
    ]
    gt, dt = _files(tmp_path, _small_split(), dets)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    assert predictions.area is None and "mask_area" not in predictions.box_counts


def _mask_file(tmp_path, seed=15):
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=30, n_classes=3, boxes_per_image=3, width=120, height=90)
    scenario = {"holes": 0.3, "empty": 0.1, "with_box": 0.3, "false": 3.0}
    dets = _mask_results(rng, split, scenario)
    return _files(tmp_path, split, dets)


@pytest.mark.parametrize("images_per_shard", [1, 7, 30])
def test_streamed_pieces_equal_the_whole_files(tmp_path, monkeypatch, images_per_shard):
    """Read a few records at a time (tiny slices, records of a shard in many blocks),
    the pieces carry the masks' areas, bit for bit those of the whole load's pieces."""
    from evaluation.engine.loaders import results_stream

    from .test_stream_pieces import _compare as compare_pieces

    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 1024)
    gt, dt = _mask_file(tmp_path)
    truth = load_truth(gt)
    predictions, reference = compare_pieces(dt, truth, images_per_shard, tmp_path)
    assert predictions.area is not None
    assert all(piece[2].area is not None for piece in reference)
    assert predictions.box_counts["mask_area"] == len(predictions)


@pytest.mark.parametrize("protocol", ["coco", "recall40", "voc"])
@pytest.mark.parametrize("images_per_shard", [1, 7])
def test_sharded_run_equals_the_whole_run(tmp_path, protocol, images_per_shard):
    """Matched shard by shard and merged: every record field and the annotated
    scorecard (its area source too) equal the whole run's."""
    from evaluation.engine import match, shards

    from .test_shards import FIELDS, _scorecard, _sharded

    gt, dt = _mask_file(tmp_path)
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    whole = match(truth, predictions, protocol)
    merged, _ = _sharded(truth, predictions, protocol, images_per_shard, tmp_path)
    for name in FIELDS:
        a, b = getattr(whole, name), getattr(merged, name)
        if isinstance(a, np.ndarray):
            assert a.dtype == b.dtype and a.tobytes() == b.tobytes(), name
        else:
            assert a == b, name
    counts = shards.PredictionCounts.of(predictions)
    card = _scorecard(merged, truth, counts, protocol)
    assert card == _scorecard(whole, truth, predictions, protocol)
    assert "mask area (RLE)" in card


def test_cache_keeps_the_areas(tmp_path):
    """A cached load (``.npz`` entry) gives the same areas and boxes as a fresh one."""
    gt, dt = _mask_file(tmp_path)
    truth = load_truth(gt)
    cache = tmp_path / "cache"
    first = load_predictions(dt, truth, cache_dir=cache)
    again = load_predictions(dt, truth, cache_dir=cache)
    assert again.area.tobytes() == first.area.tobytes()
    assert again.boxes.tobytes() == first.boxes.tobytes()
    assert again.box_counts == first.box_counts


def test_the_cli_scores_masks_and_refuses_bad_ones(tmp_path, capsys):
    """``python -m evaluation.engine score``: the JSON result equals pycocotools 2.0.11
    and records the mask area; a bad mask exits 2 with file, record and field."""
    from evaluation.engine import COCO_SUMMARY_KEYS
    from evaluation.engine.__main__ import main

    from .conftest import as_reference

    gt, dt = _mask_file(tmp_path)
    assert main(["score", "--truth", str(gt), "--predictions", str(dt), "--format", "json"]) == 0
    result = json.loads(capsys.readouterr().out)
    reference = pycocotools_eval(gt, dt)
    for key, expected in zip(COCO_SUMMARY_KEYS, reference.stats):
        assert as_reference(result["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    assert "mask area (RLE)" in result["protocol_record"]["area_source"]["predictions"]
    dets = json.loads(dt.read_text())
    dets[3]["segmentation"]["counts"] = [1, 2, 3]
    dt.write_text(json.dumps(dets))
    assert main(["score", "--truth", str(gt), "--predictions", str(dt)]) == 2
    err = capsys.readouterr().err
    assert "record 3" in err and "segmentation.counts" in err and "Traceback" not in err


def test_scores_beyond_2_53_in_a_mask_file(tmp_path):
    """A score of magnitude >= 2**53 makes the loader read the file a second time
    loosely (``exact_scores``); in a file read as masks that read is the masks' too,
    and the numbers stay pycocotools 2.0.11's."""
    gt, dt = _mask_file(tmp_path)
    dets = json.loads(dt.read_text())
    dets[2]["score"], dets[5]["score"] = 2.0**60, 2**60 + 1
    dt.write_text(json.dumps(dets))
    truth = load_truth(gt)
    predictions = load_predictions(dt, truth)
    assert predictions.area is not None
    result = evaluate(truth, predictions, "coco")
    assert result["summary"]["AP"] == pytest.approx(pycocotools_eval(gt, dt).stats[0], abs=1e-12)


def test_explain_names_the_area_source_only_between_readings(tmp_path):
    """Two mask files differ in no setting (the count is in ``counts``, not the
    record); a mask file against a box file differs in ``area_source``, with words."""
    from evaluation.engine import annotate, match, score_records
    from evaluation.engine.explain import differences

    def result(dt, truth):
        predictions = load_predictions(dt, truth)
        records = match(truth, predictions, "coco")
        return annotate(score_records(records, "coco"), truth, predictions, records, "coco")

    gt, dt = _mask_file(tmp_path)
    truth = load_truth(gt)
    dets = json.loads(dt.read_text())
    fewer = tmp_path / "fewer.json"
    fewer.write_text(json.dumps(dets[:-3]))
    boxes = tmp_path / "boxes.json"
    with_boxes = [{**d, "bbox": [1.0, 2.0, 3.0, 4.0]} for d in dets]
    boxes.write_text(json.dumps(with_boxes))
    masks = result(dt, truth)
    assert [d[0] for d in differences(masks, result(fewer, truth))] == []
    found = {d[0]: d for d in differences(masks, result(boxes, truth))}
    assert "area_source" in found and "mask" in found["area_source"][3]


@pytest.mark.parametrize("validate_first", [True, False])
def test_a_bad_mask_late_in_a_big_file_is_refused_in_either_pass(
    tmp_path, monkeypatch, validate_first
):
    """A file past ``VALIDATE_FIRST_BYTES`` is checked by a pass that keeps no columns:
    that pass reads masks too and refuses the same record, as the building pass does."""
    from evaluation.engine.loaders import coco_json, results_stream

    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 2048)
    monkeypatch.setattr(coco_json, "VALIDATE_FIRST_BYTES", 0 if validate_first else 1 << 40)
    gt, dt = _mask_file(tmp_path)
    dets = json.loads(dt.read_text())
    late = len(dets) - 2
    dets[late]["segmentation"]["counts"] = dets[late]["segmentation"]["counts"] + "P"
    dt.write_text(json.dumps(dets))
    with pytest.raises(InputError) as error:
        load_predictions(dt, load_truth(gt))
    assert error.value.record == f"record {late}"
    assert error.value.field == "segmentation.counts"


@pytest.mark.parametrize("protocol", ["voc07", "voc", "recall40", "kitti2d", "miss-rate"])
def test_other_protocols_read_the_masks_boxes(tmp_path, protocol):
    """Every other protocol scores a mask file as the box file of the boxes pycocotools
    derives (``maskUtils.toBbox``) or the file gives; only size ranges read the masks'
    areas (the slices' small/medium/large buckets of every preset; the VOC "all" bucket
    has no bounds, and the levels and setups read heights)."""
    from evaluation.engine import evaluate_levels, evaluate_setups

    gt, dt = _mask_file(tmp_path)
    truth = load_truth(gt)
    masks = load_predictions(dt, truth)
    dets = json.loads(dt.read_text())
    for d in dets:
        d["bbox"] = mask_utils.toBbox(d["segmentation"]).tolist() if "bbox" not in d else d["bbox"]
        del d["segmentation"]
    boxes_path = tmp_path / "boxes.json"
    boxes_path.write_text(json.dumps(dets))
    boxes = load_predictions(boxes_path, truth)
    assert boxes.boxes.tobytes() == masks.boxes.tobytes()
    if protocol in ("kitti2d", "miss-rate"):
        run = evaluate_levels if protocol == "kitti2d" else evaluate_setups
        a, b = run(truth, masks, protocol), run(truth, boxes, protocol)
    else:
        plain = evaluate(truth, boxes, protocol)
        boxes = dataclasses_replace(boxes, area=masks.area)  # size buckets read the areas
        a, b = evaluate(truth, masks, protocol), evaluate(truth, boxes, protocol)
        if protocol != "recall40":  # the VOC "all" bucket has no bounds: areas unread
            assert a["per_class"] and all(
                a["per_class"][k]["AP"] == plain["per_class"][k]["AP"] for k in a["per_class"]
            )
    numbers = [k for k in a if k not in ("counts", "protocol_record")]
    assert numbers and [a[k] for k in numbers] == [b[k] for k in numbers]


def dataclasses_replace(obj, **changes):
    import dataclasses

    return dataclasses.replace(obj, **changes)
