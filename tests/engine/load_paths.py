"""Every way the engine reads a results file gives the whole read's columns: slices of
any size (``results_stream.CHUNK_BYTES``), a file validated first
(``coco_json.VALIDATE_FIRST_BYTES``), a cached load, the streamed per-shard pieces
(``test_stream_pieces._compare``); and the whole read scores as pycocotools 2.0.11
(``COCOeval(..., 'bbox')``) scores the same two files."""

import pytest

from evaluation.engine import COCO_SUMMARY_KEYS, evaluate, load_predictions
from evaluation.engine.loaders import coco_json, results_stream

from .conftest import as_reference, pycocotools_eval

COLUMNS = ("image", "cls", "boxes", "score", "area")


def same_columns(a, b, names=COLUMNS):
    """Column by column: both absent (the box reading has no area), or the same dtype
    and bytes."""
    for name in names:
        x, y = getattr(a, name), getattr(b, name)
        if x is None or y is None:
            assert x is None and y is None, name
        else:
            assert x.dtype == y.dtype and x.tobytes() == y.tobytes(), name


def as_pycocotools(gt, dt, truth, predictions):
    """The engine's ``coco`` summary of ``predictions`` equals pycocotools 2.0.11 run on
    ``gt`` and ``dt`` (to 1e-12)."""
    ours = evaluate(truth, predictions, "coco")["summary"]
    reference = pycocotools_eval(gt, dt).stats
    assert [as_reference(ours[k]) for k in COCO_SUMMARY_KEYS] == pytest.approx(
        list(reference), abs=1e-12
    )


def every_slice_size(monkeypatch, dt, truth, whole, names=COLUMNS):
    """``dt`` read in slices of every size from 1 byte to the file's length: each read
    has the columns ``names`` of ``whole``."""
    for chunk in range(1, len(dt.read_bytes()) + 1):
        with monkeypatch.context() as m:
            m.setattr(results_stream, "CHUNK_BYTES", chunk)
            same_columns(load_predictions(dt, truth), whole, names)


def every_path_agrees(tmp_path, monkeypatch, dt, truth, whole, chunk, names=COLUMNS):
    """A cached load (written, then read back), slices of ``chunk`` bytes, then also
    validated first: each has the bytes of ``whole``'s columns ``names`` (absent where
    it is absent) and its counts; the streamed pieces (1 and 2 images a shard) count
    alike."""
    from .test_stream_pieces import _compare as compare_pieces

    cache = tmp_path / "cache"
    load_predictions(dt, truth, cache_dir=cache)
    loads = [load_predictions(dt, truth, cache_dir=cache)]
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", chunk)
    loads.append(load_predictions(dt, truth))
    monkeypatch.setattr(coco_json, "VALIDATE_FIRST_BYTES", 0)
    loads.append(load_predictions(dt, truth))
    for other in loads:
        for name in names:
            if getattr(whole, name) is None:  # the box reading: no area column
                assert getattr(other, name) is None
                continue
            assert getattr(whole, name).tobytes() == getattr(other, name).tobytes(), name
        assert whole.box_counts == other.box_counts
    for images_per_shard in (1, 2):
        work = tmp_path / f"pieces-{images_per_shard}"
        work.mkdir()
        predictions, _ = compare_pieces(dt, truth, images_per_shard, work)
        assert predictions.box_counts == whole.box_counts
