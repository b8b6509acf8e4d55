"""Pieces streamed from a predictions file equal the pieces cut from its whole load.

The reference is the engine's own whole-file path — ``load_predictions`` then
``shards.pieces`` and ``shards.save_piece`` — which ``test_shards.py`` holds to the
single-process run, and which the other engine tests hold to pycocotools 2.0.11
(``test_coco_reference.py``) and the VOC devkit's rules. A streamed piece must equal
it in every field, bit for bit: same arrays (dtype, shape, bytes; NaN where NaN) and
the same whole-file counts. Blocks are made tiny so that every file spans many of them
and records of one shard arrive in many blocks.
"""

import csv
import json

import numpy as np
import pytest

from evaluation.engine import InputError, load_predictions, load_truth, shards
from evaluation.engine.loaders import csv_tables, results_stream
from evaluation.engine.pieces import stream_pieces

from .synthetic import make_detections, make_split


@pytest.fixture(autouse=True)
def tiny_blocks(monkeypatch):
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 1024)
    monkeypatch.setattr(csv_tables, "BLOCK_ROWS", 7)


def _split_and_detections(seed=15, n_images=40):
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=n_images, n_classes=4, boxes_per_image=3, crowd_rate=0.1)
    dets = make_detections(rng, split, score_levels=7, duplicate_rate=0.4)  # ties
    return split, dets


def _write_json(path, obj):
    path.write_text(json.dumps(obj))
    return path


def _write_csv(path, dets):
    with open(path, "w", newline="") as f:
        out = csv.writer(f)
        out.writerow(["image_id", "label", "x_min", "y_min", "x_max", "y_max", "score"])
        for d in dets:
            x, y, w, h = d["bbox"]
            out.writerow(
                [d["image_id"], f"class{d['category_id']}", x, y, x + w, y + h, d["score"]]
            )
    return path


def _same_arrays(a, b, what):
    assert a.dtype == b.dtype, what
    assert a.shape == b.shape, what
    assert a.tobytes() == b.tobytes(), what


def _same_piece(streamed, reference):
    """Every field of two pieces (``shards.load_piece``) equal, bit for bit."""
    for label, got, want in zip(
        ("truth", "box_index", "predictions", "positions"), streamed, reference
    ):
        if isinstance(want, np.ndarray):
            _same_arrays(got, want, label)
            continue
        for name, value in vars(want).items():
            other = getattr(got, name)
            if isinstance(value, np.ndarray):
                _same_arrays(other, value, f"{label}.{name}")
            elif name != "source":  # the path each side was given
                assert other == value, f"{label}.{name}"


def _reference(path, truth, ranges, tmp_path, **options):
    predictions = load_predictions(path, truth, **options)
    out = []
    for k, piece in enumerate(shards.pieces(truth, predictions, ranges)):
        saved = tmp_path / f"reference-{k}.npz"
        shards.save_piece(saved, *piece)
        out.append(shards.load_piece(saved))
    return predictions, out


def _compare(path, truth, images_per_shard, tmp_path, **options):
    ranges = shards.plan(truth.n_images, images_per_shard)
    predictions, reference = _reference(path, truth, ranges, tmp_path, **options)
    work = tmp_path / "stream"
    work.mkdir(exist_ok=True)
    streamed = stream_pieces(path, truth, ranges, work, **options)
    assert len(streamed.paths) == len(ranges)
    for k, piece_path in enumerate(streamed.paths):
        _same_piece(shards.load_piece(piece_path), reference[k])
        assert streamed.detections[k] == len(reference[k][2])
    assert streamed.counts == shards.PredictionCounts.of(predictions)
    assert sorted(p.name for p in work.iterdir()) == sorted(
        f"piece-{k}.npz" for k in range(len(ranges))
    ), "spill files are removed once their piece is written"
    return predictions, reference


@pytest.mark.parametrize("fmt", ["json", "csv"])
@pytest.mark.parametrize("images_per_shard", [1, 7, 13, 40])
def test_streamed_pieces_equal_the_whole_files_pieces(tmp_path, fmt, images_per_shard):
    """Records in random image order, ties of score across shard boundaries; shards of
    one image, uneven shards and a single shard."""
    split, dets = _split_and_detections()
    truth = load_truth(_write_json(tmp_path / "truth.json", split))
    path = (
        _write_json(tmp_path / "dets.json", dets)
        if fmt == "json"
        else _write_csv(tmp_path / "dets.csv", dets)
    )
    _compare(path, truth, images_per_shard, tmp_path)


def test_images_without_detections_and_detections_only_in_the_last_shard(tmp_path):
    """Shards with no detection at all get pieces with empty columns of the right
    dtypes and shapes; the last shard's images hold every detection."""
    split, dets = _split_and_detections()
    truth = load_truth(_write_json(tmp_path / "truth.json", split))
    last_images = {int(i) for i in truth.image_ids[-5:]}
    dets = [d for d in dets if d["image_id"] in last_images]
    assert dets
    path = _write_json(tmp_path / "dets.json", dets)
    _, reference = _compare(path, truth, 8, tmp_path)
    assert [len(p[2]) for p in reference[:-1]] == [0] * (len(reference) - 1)


def test_records_grouped_by_image_and_reversed(tmp_path):
    """The order of records in the file decides positions and tie order; any order is
    cut like the whole load cuts it."""
    split, dets = _split_and_detections(seed=3)
    truth = load_truth(_write_json(tmp_path / "truth.json", split))
    for order in (sorted(dets, key=lambda d: d["image_id"]), dets[::-1]):
        path = _write_json(tmp_path / "dets.json", order)
        _compare(path, truth, 6, tmp_path)


def test_an_empty_file_of_records(tmp_path):
    split, _ = _split_and_detections()
    truth = load_truth(_write_json(tmp_path / "truth.json", split))
    _compare(_write_json(tmp_path / "dets.json", []), truth, 9, tmp_path)
    _compare(_write_csv(tmp_path / "dets.csv", []), truth, 9, tmp_path)


@pytest.mark.parametrize("boxes", ["keep", "clip"])
def test_box_policies_and_boxes_outside_the_frame(tmp_path, boxes):
    """Clipped boxes and the whole file's box counts (summed over blocks)."""
    split, dets = _split_and_detections(seed=8)
    for d in dets[::5]:
        d["bbox"] = [d["bbox"][0] + 600.0, d["bbox"][1], d["bbox"][2], d["bbox"][3]]
    truth = load_truth(_write_json(tmp_path / "truth.json", split), boxes=boxes)
    predictions, _ = _compare(_write_json(tmp_path / "dets.json", dets), truth, 7, tmp_path)
    assert predictions.box_counts["out_of_frame"] > 0


def test_unknown_images_dropped_on_a_later_revision(tmp_path):
    """A stored file re-scored on a revision without some images: their detections are
    dropped and counted (``dropped_images``), positions count the kept records only."""
    split, dets = _split_and_detections(seed=5)
    removed = {im["id"] for im in split["images"][::4]}
    revised = {
        **split,
        "images": [im for im in split["images"] if im["id"] not in removed],
        "annotations": [a for a in split["annotations"] if a["image_id"] not in removed],
    }
    truth = load_truth(_write_json(tmp_path / "truth.json", revised))
    path = _write_json(tmp_path / "dets.json", dets)
    predictions, _ = _compare(path, truth, 6, tmp_path, unknown_images="drop")
    assert predictions.dropped_images == sum(d["image_id"] in removed for d in dets) > 0


def test_unknown_classes_dropped(tmp_path):
    rng = np.random.default_rng(21)
    split = make_split(rng, n_images=30, n_classes=3)
    dets = make_detections(rng, split, extra_class_rate=0.2)
    truth = load_truth(_write_json(tmp_path / "truth.json", split))
    path = _write_json(tmp_path / "dets.json", dets)
    predictions, _ = _compare(path, truth, 7, tmp_path, unknown_classes="drop")
    assert predictions.dropped > 0
    # the dropped records' class ids, as the file gives them, equal whole and streamed
    # (``_compare`` checks the streamed counts equal the whole load's)
    unknown = {d["category_id"] for d in dets} - {c["id"] for c in split["categories"]}
    assert predictions.dropped_classes == tuple(str(k) for k in sorted(unknown))


def test_a_bad_record_late_in_the_file_is_refused_and_no_piece_written(tmp_path):
    """The stream names the file, the record and the field, as the whole load does."""
    split, dets = _split_and_detections()
    truth = load_truth(_write_json(tmp_path / "truth.json", split))
    dets[-3]["image_id"] = 999_999
    path = _write_json(tmp_path / "dets.json", dets)
    with pytest.raises(InputError) as whole:
        load_predictions(path, truth)
    work = tmp_path / "stream"
    work.mkdir()
    ranges = shards.plan(truth.n_images, 7)
    with pytest.raises(InputError) as streamed:
        stream_pieces(path, truth, ranges, work)
    assert str(streamed.value) == str(whole.value)
    assert f"record {len(dets) - 3}" in str(streamed.value)
    assert not list(work.glob("piece-*"))


def test_label_archives_are_not_streamed(tmp_path):
    split, _ = _split_and_detections()
    truth = load_truth(_write_json(tmp_path / "truth.json", split))
    (tmp_path / "labels").mkdir()  # a folder of label files
    with pytest.raises(InputError, match="cannot be read a block at a time"):
        stream_pieces(tmp_path / "labels", truth, [(0, 40)], tmp_path, fmt="kitti")
