"""Results files read a few bytes at a time: the reading (boxes or RLE masks, as
pycocotools 2.0.11 ``COCO.loadRes`` picks it from the first result) and every column
are the same whatever the slice size, also when records carry nested objects whose
``},`` a slice may end at. References: pycocotools 2.0.11 (``loadRes``, ``COCOeval``
with ``iouType='bbox'``) run on the same files; the whole-file read with the default
slice size."""

import json
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pycocotools import mask as mask_utils

from evaluation.engine import load_predictions, load_truth
from evaluation.engine.loaders import results_stream

from .load_paths import as_pycocotools, every_slice_size, same_columns
from .test_mask_results import _small_split
from .test_stream_pieces import _compare as compare_pieces

W, H = 40, 30


def _rle(y, x, bh, bw):
    """pycocotools 2.0.11's own encoding of a rectangle mask (its counts as text)."""
    m = np.zeros((H, W), np.uint8, order="F")
    m[y : y + bh, x : x + bw] = 1
    r = mask_utils.encode(np.asfortranarray(m))
    return {"size": [H, W], "counts": r["counts"].decode()}


def _split(rng, n_images=3):
    anns = []
    for image in range(1, n_images + 1):
        for _ in range(int(rng.integers(1, 4))):
            x, y = int(rng.integers(0, W - 12)), int(rng.integers(0, H - 10))
            w, h = int(rng.integers(3, 12)), int(rng.integers(3, 10))
            anns.append(
                {
                    "id": len(anns) + 1,
                    "image_id": image,
                    "category_id": int(rng.integers(1, 3)),
                    "bbox": [x, y, w, h],
                    "area": float(w * h),
                    "iscrowd": 0,
                }
            )
    return {
        "images": [{"id": i, "width": W, "height": H} for i in range(1, n_images + 1)],
        "annotations": anns,
        "categories": [{"id": 1, "name": "car"}, {"id": 2, "name": "van"}],
    }


def _detections(rng, split, masks):
    """Results near the ground truth; mask files: ``segmentation`` (an RLE object)
    without ``bbox``; box files: ``bbox`` plus nested extra keys (an RLE object,
    ``attributes`` with an object inside, a list of lists), in a random key order."""
    out = []
    for ann in split["annotations"]:
        for _ in range(int(rng.integers(1, 3))):
            x, y, w, h = (int(v + rng.integers(-2, 3)) for v in ann["bbox"])
            x, y = min(max(x, 0), W - 4), min(max(y, 0), H - 4)
            w, h = max(min(w, W - x), 2), max(min(h, H - y), 2)
            record = {
                "image_id": ann["image_id"],
                "category_id": int(rng.integers(1, 3)),
                "score": round(float(rng.random()), 3),
            }
            if masks:
                record["segmentation"] = _rle(y, x, h, w)
            else:
                record["bbox"] = [x, y, w, h]
                record["segmentation"] = _rle(y, x, h, w)
                record["attributes"] = {"occluded": {"by": "van}, {"}, "level": 1}
                record["polygon_parts"] = [[x, y], [x + w, y + h]]
            keys = list(record)
            rng.shuffle(keys)
            out.append({k: record[k] for k in keys})
    return out


def _files(tmp_path, split, dets):
    gt, dt = tmp_path / "truth.json", tmp_path / "results.json"
    gt.write_text(json.dumps(split))
    dt.write_text(json.dumps(dets))
    return gt, dt


def test_slice_ending_at_a_nested_segmentation_close(tmp_path, monkeypatch):
    """The audit's case, small: two mask results (segmentation, then score), the first
    slice ending right after the last record's ``segmentation`` object's ``}, ``. Was
    refused as boxes ("record 0: field 'bbox' ... got None"); pycocotools 2.0.11 scores
    it, and so do we, equal."""
    small = _small_split()  # one 40x30 image (W x H), one box
    dets = [
        {"image_id": 1, "category_id": 1, "segmentation": _rle(20, 20, 5, 5), "score": 0.9},
        {"image_id": 1, "category_id": 1, "segmentation": _rle(3, 2, 8, 10), "score": 0.8},
    ]
    gt, dt = _files(tmp_path, small, dets)
    text = dt.read_bytes()
    cut = text.rindex(b'"score"')
    assert text[:cut].rstrip().endswith(b"},")  # the nested object's close
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", cut)
    sliced = load_predictions(dt, truth)
    assert sliced.area is not None
    same_columns(sliced, whole)
    as_pycocotools(gt, dt, truth, sliced)
    compare_pieces(dt, truth, 1, tmp_path)


@settings(
    max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    seed=st.integers(0, 2**32 - 1),
    masks=st.booleans(),
    chunk=st.integers(1, 600),
    images_per_shard=st.sampled_from([1, 2, 3]),
)
def test_any_slice_size_reads_as_the_whole_file(
    tmp_path, monkeypatch, seed, masks, chunk, images_per_shard
):
    """Slices of 1..600 bytes (the files are ~1-4 KB: cuts land everywhere, inside
    nested objects and strings holding "}, {"): the whole-file read and the streamed
    pieces equal the default-size read, and the scores equal pycocotools 2.0.11's."""
    with tempfile.TemporaryDirectory(dir=tmp_path) as d:  # one per example
        _slices_read_alike(Path(d), monkeypatch, seed, masks, chunk, images_per_shard)


def _slices_read_alike(tmp_path, monkeypatch, seed, masks, chunk, images_per_shard):
    rng = np.random.default_rng(seed)
    split = _split(rng)
    gt, dt = _files(tmp_path, split, _detections(rng, split, masks))
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    assert (whole.area is not None) == masks
    with monkeypatch.context() as m:
        m.setattr(results_stream, "CHUNK_BYTES", chunk)
        sliced = load_predictions(dt, truth)
        same_columns(sliced, whole)
        compare_pieces(dt, truth, images_per_shard, tmp_path)
    as_pycocotools(gt, dt, truth, whole)


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
def test_a_literal_cut_by_a_slice_end_is_read_whole(tmp_path, monkeypatch, literal):
    """``NaN``/``Infinity``/``-Infinity`` (Python's json reads them; pycocotools 2.0.11
    scores such files) in an unread key of the first record, padded past the slice
    size, and of a later one; every slice size from 1 byte to the file's length, so
    a slice ends inside each literal (msgspec calls ``Na`` an invalid character, not a
    truncation). Was refused as "not valid JSON"; the columns equal the whole read's
    and the scores pycocotools 2.0.11's."""
    rng = np.random.default_rng(7)
    split = _split(rng, n_images=2)
    dets = _detections(rng, split, masks=False)[:3]
    for record in dets:
        record["note"] = "p" * 40
        record["extra"] = "LITERAL"
    gt, dt = _files(tmp_path, split, dets)
    dt.write_text(dt.read_text().replace('"LITERAL"', literal))
    truth = load_truth(gt)
    whole = load_predictions(dt, truth)
    as_pycocotools(gt, dt, truth, whole)
    every_slice_size(monkeypatch, dt, truth, whole)
