"""Corners as read (red team audit13 F1): voc, voc07 and kitti2d measure overlap on
the corners a VOC XML file, a VOC devkit result file, a CSV with corner columns or a
KITTI label gives, as their devkits do, not on ``x1 + (x2 - x1)``, which can miss
``x2`` by an ulp (17.8 + (50.6 - 17.8) is 50.599999999999994).

Sources: the PASCAL VOC devkit's ``VOCevaldet.m`` (``oracle.voc_evaldet``, a
transliteration reading corner lists, written from the published code's logic), the
KITTI object devkit's ``evaluate_object.cpp`` (``oracle.kitti_*``, written from its
published logic), pycocotools 2.0.11 (``coco`` reads xywh, so it equals pycocotools on
the COCO JSON a converter writes, ``w = x2 - x1``). Coordinates with two decimals are
built to sit at IoU exactly 0.5 in real arithmetic, so float rounding decides; each
random test first checks that its sample holds pairs where ``x + w`` decides otherwise
than the corners (so it fails on the engine before 2.23.0).
"""

import csv
import json

import numpy as np
import pytest

from evaluation.engine import evaluate, load_predictions, load_truth, shards
from evaluation.engine.difficulty import evaluate_levels

from . import oracle
from .conftest import as_reference, pycocotools_eval
from .test_difficulty import _oracle as _kitti_oracle
from .test_difficulty import _write as _write_kitti

COCO_KEYS = ("AP", "AP50", "AP75", "AR1", "AR10", "AR100")


def _text(hundredths):
    """Two-decimal text of a non-negative count of hundredths (no float rounding)."""
    return f"{hundredths // 100}.{hundredths % 100:02d}"


def _write_voc(folder, truth, dets, cls="car"):
    """VOC XML annotations (one per image, 500x500) and one devkit result file
    ``comp4_det_test_<cls>.txt``; ``truth``: ``(image, [x1, y1, x2, y2] texts)``,
    ``dets``: ``(image, score text, corner texts)``."""
    gt_folder, det_folder = folder / "truth", folder / "dets"
    gt_folder.mkdir(parents=True)
    det_folder.mkdir(parents=True)
    by_image = {}
    for image, box in truth:
        by_image.setdefault(image, []).append(box)
    for image, boxes in by_image.items():
        objects = "".join(
            f"<object><name>{cls}</name><difficult>0</difficult><bndbox><xmin>{b[0]}</xmin>"
            f"<ymin>{b[1]}</ymin><xmax>{b[2]}</xmax><ymax>{b[3]}</ymax></bndbox></object>"
            for b in boxes
        )
        (gt_folder / f"{image}.xml").write_text(
            f"<annotation><filename>{image}.jpg</filename><size><width>500</width>"
            f"<height>500</height><depth>3</depth></size>{objects}</annotation>"
        )
    lines = "".join(f"{image} {score} {' '.join(box)}\n" for image, score, box in dets)
    (det_folder / f"comp4_det_test_{cls}.txt").write_text(lines)
    return gt_folder, det_folder, {}


def _write_csv(folder, truth, dets, cls="car"):
    folder.mkdir(parents=True, exist_ok=True)
    images = sorted({image for image, _ in truth})
    with open(folder / "images.csv", "w", newline="") as f:
        out = csv.writer(f)
        out.writerow(["image_id", "width", "height"])
        out.writerows([image, 500, 500] for image in images)
    with open(folder / "truth.csv", "w", newline="") as f:
        out = csv.writer(f)
        out.writerow(["image_id", "label", "x_min", "y_min", "x_max", "y_max"])
        out.writerows([image, cls, *box] for image, box in truth)
    with open(folder / "dets.csv", "w", newline="") as f:
        out = csv.writer(f)
        out.writerow(["image_id", "label", "x_min", "y_min", "x_max", "y_max", "score"])
        out.writerows([image, cls, *box, score] for image, score, box in dets)
    return folder / "truth.csv", folder / "dets.csv", {"images": folder / "images.csv"}


WRITERS = {"voc": _write_voc, "csv": _write_csv}


def _load(fmt, folder, truth, dets):
    gt_path, dt_path, options = WRITERS[fmt](folder, truth, dets)
    loaded = load_truth(gt_path, **options)
    return loaded, load_predictions(dt_path, loaded)


def _devkit(truth, dets, eleven_point):
    """``oracle.voc_evaldet`` on the corners as the files give them (``float`` of the
    text, as MATLAB's ``textread`` and ``str2double`` read decimal text)."""
    gt = {}
    for image, box in truth:
        gt.setdefault(image, []).append((*(float(v) for v in box), False))
    lines = [(image, float(score), *(float(v) for v in box)) for image, score, box in dets]
    return oracle.voc_evaldet(gt, lines, eleven_point=eleven_point)


# The audit's case: VOC XML truth 27 10 66 20, a py-faster-rcnn style result line
# "000001 0.900 17.8 10.0 50.6 20.0"; the devkit's ov = 0.5000000000000001 >= 0.5: TP.
AUDIT_TRUTH = [("000001", ["27", "10", "66", "20"])]
AUDIT_DETS = [("000001", "0.900", ["17.8", "10.0", "50.6", "20.0"])]


@pytest.mark.parametrize("fmt", ["voc", "csv"])
@pytest.mark.parametrize("protocol, expected", [("voc07", 1.0000000000000002), ("voc", 1.0)])
def test_the_audit_case_equals_the_devkit(tmp_path, fmt, protocol, expected):
    truth, predictions = _load(fmt, tmp_path, AUDIT_TRUTH, AUDIT_DETS)
    assert truth.corners is None  # integer corners: 27 + 39 is 66 exactly
    assert predictions.corners.tolist() == [[17.8, 10.0, 50.6, 20.0]]
    assert predictions.boxes[0, 0] + predictions.boxes[0, 2] == 50.599999999999994
    devkit = _devkit(AUDIT_TRUTH, AUDIT_DETS, protocol == "voc07")
    assert devkit == expected  # the audit's devkit run (red team audit13 F1)
    ours = evaluate(truth, predictions, protocol)
    assert ours["per_class"]["car"]["AP"] == devkit
    assert ours["summary"]["AP"] == devkit


def _at_half(rng, offset):
    """Truth and detection corners, in hundredths, whose overlap is 0.5 exactly in real
    arithmetic (widths ``x2 - x1 + offset``): the detection reaches into the box from
    the left, one y range, ``3 * iw = det width + box width``."""
    while True:
        gx1 = int(rng.integers(0, 20000))
        g_width = int(rng.integers(300, 20000))
        gx2 = gx1 + g_width - offset
        dx2 = int(rng.integers(gx1, gx2 + 1))
        iw = dx2 - gx1 + offset
        d_width = 3 * iw - g_width
        dx1 = dx2 + offset - d_width
        if d_width > offset and 0 <= dx1 <= gx1:
            break
    y1 = int(rng.integers(0, 20000))
    y2 = y1 + int(rng.integers(5000, 15000))
    return [gx1, y1, gx2, y2], [dx1, y1, dx2, y2]


def _random_pairs(seed, n, offset):
    rng = np.random.default_rng(seed)
    scores = rng.permutation(n) + 1
    truth, dets = [], []
    for k in range(n):
        gt, det = _at_half(rng, offset)
        image = f"{k:06d}"
        truth.append((image, [_text(v) for v in gt]))
        dets.append((image, f"0.{scores[k]:04d}", [_text(v) for v in det]))
    return truth, dets


def _rebuilt(box):
    """Corners as a converter's xywh gives them back: ``x1 + (x2 - x1)``."""
    x1, y1, x2, y2 = (float(v) for v in box)
    return [x1, y1, x1 + (x2 - x1), y1 + (y2 - y1)]


def _flips(truth, dets, decide):
    """How many pairs ``decide(gt corners, det corners)`` answers otherwise on the
    corners read than on ``x1 + w``."""
    return sum(
        decide([float(v) for v in g], [float(v) for v in d]) != decide(_rebuilt(g), _rebuilt(d))
        for (_, g), (_, _, d) in zip(truth, dets)
    )


def _voc_hit(g, d):
    return oracle.voc_evaldet({1: [(*g, False)]}, [(1, 1.0, *d)], eleven_point=False) == 1.0


@pytest.mark.parametrize("fmt", ["voc", "csv"])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_random_pairs_at_half_equal_the_devkit(tmp_path, fmt, seed):
    truth, dets = _random_pairs(seed, 300, offset=100)
    assert _flips(truth, dets, _voc_hit) > 0  # x + w would decide some otherwise
    loaded, predictions = _load(fmt, tmp_path, truth, dets)
    assert predictions.corners is not None
    for protocol in ("voc07", "voc"):
        devkit = _devkit(truth, dets, protocol == "voc07")
        ours = evaluate(loaded, predictions, protocol)
        assert ours["per_class"]["car"]["AP"] == devkit, protocol  # bit for bit


def _kitti_scenes(truth, dets, kind="Pedestrian"):
    scenes = [[(kind, *(float(v) for v in box), 0.0, 0)] for _, box in truth]
    detections = [[(kind, *(float(v) for v in box), float(s))] for _, s, box in dets]
    return scenes, detections


def _kitti_hit(g, d):
    return oracle.kitti_box_overlap((None, *d), (None, *g)) > 0.5


@pytest.mark.parametrize("seed", [3, 4])
def test_kitti2d_on_corners_at_half_equals_the_devkit(tmp_path, seed):
    """Pedestrians (overlap 0.5) built at IoU 0.5 without the pixel offset, 60 images:
    every precision slot of every level equals the devkit transliteration."""
    truth, dets = _random_pairs(seed, 60, offset=0)
    assert _flips(truth, dets, _kitti_hit) > 0
    scenes, detections = _kitti_scenes(truth, dets)
    loaded, predictions = _write_kitti(tmp_path / "gt", scenes, detections)
    assert loaded.corners is not None or predictions.corners is not None
    result = evaluate_levels(loaded, predictions, "kitti2d")
    for level in ("easy", "moderate", "hard"):
        expected, n_gt = _kitti_oracle("pedestrian", scenes, detections, level)
        ours = result["levels"][level]["classes"]["Pedestrian"]
        assert ours["n_gt"] == n_gt
        assert ours["precision"] == expected, level


def _coco_twin(folder, truth, dets):
    """The COCO JSON a converter writes of the corner files: ``w = x2 - x1``."""
    index = {image: k + 1 for k, image in enumerate(sorted({i for i, _ in truth}))}

    def xywh(box):
        x1, y1, x2, y2 = (float(v) for v in box)
        return [x1, y1, x2 - x1, y2 - y1]

    split = {
        "images": [{"id": k, "width": 500, "height": 500} for k in index.values()],
        "categories": [{"id": 1, "name": "car"}],
        "annotations": [
            {
                "id": n + 1,
                "image_id": index[image],
                "category_id": 1,
                "bbox": xywh(box),
                "area": xywh(box)[2] * xywh(box)[3],
                "iscrowd": 0,
            }
            for n, (image, box) in enumerate(truth)
        ],
    }
    results = [
        {"image_id": index[image], "category_id": 1, "bbox": xywh(box), "score": float(s)}
        for image, s, box in dets
    ]
    (folder / "truth.json").write_text(json.dumps(split))
    (folder / "dets.json").write_text(json.dumps(results))
    return folder / "truth.json", folder / "dets.json"


def _coco_hit(g, d):
    x1, y1 = max(g[0], d[0]), max(g[1], d[1])
    iw, ih = min(g[2], d[2]) - x1, min(g[3], d[3]) - y1
    inter = iw * ih
    return inter / ((g[2] - g[0]) * (g[3] - g[1]) + (d[2] - d[0]) * (d[3] - d[1]) - inter) >= 0.5


@pytest.mark.parametrize("seed", [5, 6])
def test_coco_on_csv_corners_equals_pycocotools_on_the_converters_json(tmp_path, seed):
    """``coco`` keeps ``x + w`` (pycocotools reads xywh): a CSV of corners scores as
    pycocotools 2.0.11 scores the COCO JSON a converter writes of it, though the
    corners alone would decide some pairs at IoU 0.5 otherwise."""
    truth, dets = _random_pairs(seed, 120, offset=0)
    assert _flips(truth, dets, _coco_hit) > 0
    loaded, predictions = _load("csv", tmp_path / "csv", truth, dets)
    assert predictions.corners is not None or loaded.corners is not None
    ours = evaluate(loaded, predictions, "coco")
    reference = pycocotools_eval(*_coco_twin(tmp_path, truth, dets))
    stats = dict(zip(("AP", "AP50", "AP75"), reference.stats[:3]))
    for key, expected in stats.items():
        assert as_reference(ours["summary"][key]) == pytest.approx(expected, abs=1e-12), key
    assert ours["summary"]["AP50"] == pytest.approx(reference.stats[1], abs=1e-12)


# The hash: the F1 pair with the corners on the truth side. "50.599999999999994" is
# 17.8 + (50.6 - 17.8): both files load to the same xywh (w = 32.8), only the first
# says more, and voc scores them apart (TP against FP).
SAYING = [("000001", ["17.8", "10.0", "50.6", "20.0"])]
XYWH_TWIN = [("000001", ["17.8", "10.0", "50.599999999999994", "20.0"])]
DETECTOR = [("000001", "0.9", ["27", "10", "66", "20"])]


def test_corner_saying_files_hash_apart_from_their_xywh_twin(tmp_path):
    saying, detections = _load("csv", tmp_path / "a", SAYING, DETECTOR)
    twin, twin_detections = _load("csv", tmp_path / "b", XYWH_TWIN, DETECTOR)
    assert saying.boxes.tobytes() == twin.boxes.tobytes()
    assert saying.corners is not None and twin.corners is None
    assert saying.content_hash("repeats") == twin.content_hash("repeats")
    assert saying.content_hash() != twin.content_hash()
    assert twin.content_hash() == twin.content_hash("repeats")
    # what tells them apart moves a number, as the devkit reads them
    for truth, preds, rows in ((saying, detections, SAYING), (twin, twin_detections, XYWH_TWIN)):
        devkit = _devkit(rows, DETECTOR, False)
        assert evaluate(truth, preds, "voc")["per_class"]["car"]["AP"] == devkit
    assert _devkit(SAYING, DETECTOR, False) == 1.0 and _devkit(XYWH_TWIN, DETECTOR, False) == 0.0


@pytest.mark.parametrize("fmt", ["voc", "csv"])
def test_ordinary_files_hash_as_under_repeats(tmp_path, fmt):
    """Integer corners (and any whose x1 + w gives x2 back) carry no column: their
    hash is the ``repeats`` hash, the one splits frozen before have."""
    truth = [(f"{k:06d}", [str(k), "5", str(k + 40), "60"]) for k in range(1, 30)]
    dets = [(image, "0.5", box) for image, box in truth]
    loaded, predictions = _load(fmt, tmp_path, truth, dets)
    assert loaded.corners is None and predictions.corners is None
    assert loaded.content_hash() == loaded.content_hash("repeats")


def test_cache_and_shards_keep_the_corners(tmp_path):
    truth, dets = _random_pairs(2, 50, offset=100)  # both sides say more
    gt_path, dt_path, options = _write_csv(tmp_path / "files", truth, dets)
    cache = tmp_path / "cache"
    first = load_truth(gt_path, cache_dir=cache, **options)
    again = load_truth(gt_path, cache_dir=cache, **options)
    assert again.corners is not None and again.corners.tobytes() == first.corners.tobytes()
    assert again.content_hash() == first.content_hash() != first.content_hash("repeats")
    loaded = load_predictions(dt_path, first, cache_dir=cache)
    cached = load_predictions(dt_path, first, cache_dir=cache)
    assert cached.corners.tobytes() == loaded.corners.tobytes()
    whole = evaluate(first, loaded, "voc")["per_class"]["car"]["AP"]
    assert whole == _devkit(truth, dets, False)
    ranges = shards.plan(first.n_images, 7)
    parts = []
    for k, piece in enumerate(shards.pieces(first, loaded, ranges)):
        shards.save_piece(tmp_path / f"piece-{k}.npz", *piece)
        sliced, box_index, predictions, positions = shards.load_piece(tmp_path / f"piece-{k}.npz")
        assert sliced.corners is not None and predictions.corners is not None
        records = shards.match_shard(sliced, box_index, predictions, positions, "voc")
        parts.append((records, box_index))
    merged = shards.merge(parts, first.n_boxes)
    from evaluation.engine.scorecard import score_records

    assert score_records(merged, "voc")["per_class"]["car"]["AP"] == whole


def test_kitti2d_dont_care_regions_read_as_corners(tmp_path):
    """A DontCare region reaching half way into a detection from the left
    (``imageBoxOverlap`` over the detection's area, criterion 0, compared ``> 0.5``):
    the region's x2 as read decides, as in the devkit. Per image a pedestrian found exactly (a TP) and one such
    detection; every precision slot equals the devkit transliteration."""
    rng = np.random.default_rng(8)
    scenes, detections, regions = [], [], []
    while len(scenes) < 80:
        dx1 = int(rng.integers(5000, 20000))
        half = int(rng.integers(300, 10000))
        rx1 = dx1 - int(rng.integers(1, 5000))
        det = [dx1, 10000, dx1 + 2 * half, 16000]
        region = [rx1, 9000, dx1 + half, 17000]  # ends half way into the detection
        said = _rebuilt([_text(v) for v in region]) != [float(_text(v)) for v in region]
        if len(scenes) < 40 and not said:  # half of them regions whose x + w misses x2
            continue
        k = len(scenes)
        person = (60000, 10000, 61000, 17000)
        score = float(rng.integers(1, 1000)) / 1000
        scenes.append(
            [
                ("Pedestrian", *(v / 100 for v in person), 0.0, 0),
                ("DontCare", *(float(_text(v)) for v in region), -1.0, -1),
            ]
        )
        detections.append(
            [
                ("Pedestrian", *(v / 100 for v in person), (k + 1) / 100),
                ("Pedestrian", *(float(_text(v)) for v in det), score),
            ]
        )
        regions.append(([float(_text(v)) for v in region], [float(_text(v)) for v in det]))

    def inside(region, det):
        return oracle.kitti_box_overlap((None, *det), (None, *region), 0) > 0.5

    rebuilt = [(_rebuilt(r), d) for r, d in regions]
    flips = sum(inside(*a) != inside(*b) for a, b in zip(regions, rebuilt))
    assert flips > 0  # x + w of the region would decide some otherwise
    loaded, predictions = _write_kitti(tmp_path / "gt", scenes, detections)
    assert loaded.region_corners is not None
    assert loaded.content_hash() != loaded.content_hash("repeats")
    result = evaluate_levels(loaded, predictions, "kitti2d")
    for level in ("easy", "moderate", "hard"):
        expected, n_gt = _kitti_oracle("pedestrian", scenes, detections, level)
        ours = result["levels"][level]["classes"]["Pedestrian"]
        assert ours["n_gt"] == n_gt
        assert ours["precision"] == expected, level


def test_clip_cuts_the_corners_as_read(tmp_path):
    """``--boxes clip``: an overhanging detection's read corners are cut to the frame
    (x2 50.6 in a 40 px wide image: 40), and its xywh from those; a box inside keeps
    the corners read."""
    truth = [("000001", ["27", "10", "66", "20"]), ("000002", ["27", "10", "66", "20"])]
    dets = [
        ("000001", "0.9", ["17.8", "10.0", "50.6", "20.0"]),
        ("000002", "0.8", ["17.8", "10.0", "50.6", "20.0"]),
    ]
    gt_path, dt_path, options = _write_csv(tmp_path, truth, dets)
    (tmp_path / "images.csv").write_text("image_id,width,height\n000001,40,100\n000002,60,100\n")
    loaded = load_truth(gt_path, boxes="keep", **options)
    clipped = load_predictions(dt_path, loaded, boxes="clip")
    assert clipped.box_counts["clipped"] == 1
    assert clipped.corners.tolist() == [[17.8, 10.0, 40.0, 20.0], [17.8, 10.0, 50.6, 20.0]]
    assert clipped.boxes[0].tolist() == [17.8, 10.0, 40.0 - 17.8, 10.0]
    assert clipped.boxes[1].tolist() == [17.8, 10.0, 50.6 - 17.8, 10.0]


def test_streamed_pieces_keep_the_corners(tmp_path, monkeypatch):
    """Blocks of 7 CSV rows, some saying more than their xywh and some not: every
    streamed piece equals the whole file's piece, corners included, bit for bit."""
    from evaluation.engine.loaders import csv_tables

    from .test_stream_pieces import _compare

    monkeypatch.setattr(csv_tables, "BLOCK_ROWS", 7)
    truth, dets = _random_pairs(2, 50, offset=100)
    gt_path, dt_path, options = _write_csv(tmp_path / "files", truth, dets)
    loaded = load_truth(gt_path, **options)
    predictions, reference = _compare(dt_path, loaded, 9, tmp_path)
    assert predictions.corners is not None
    assert any(piece[2].corners is not None for piece in reference)


def test_explain_says_an_older_fingerprint_may_be_the_same_split():
    """A split saying more in its corners changed fingerprint with engine 2.23.0."""
    from evaluation.engine import differences
    from evaluation.engine.explain import CORNERS_FINGERPRINT
    from evaluation.engine.version import ENGINE_VERSION

    version = tuple(map(int, ENGINE_VERSION.split(".")))
    assert CORNERS_FINGERPRINT == "2.23.0" and (2, 23, 0) <= version

    def result(version, fingerprint):
        return {"engine_version": version, "truth_fingerprint": fingerprint, "protocol_record": {}}

    before, after = result("2.22.0", "a" * 64), result("2.23.0", "b" * 64)
    effect = dict((row[0], row[3]) for row in differences(before, after))["ground truth"]
    assert "where some x1 + w is not the x2 read" in effect
    effect = dict((row[0], row[3]) for row in differences(after, result("2.23.1", "c" * 64)))
    assert "x1 + w" not in effect["ground truth"]


def test_reasons_attached_later_read_the_corners(tmp_path):
    """Records matched without reasons get, from ``reasons.attach`` with the detections'
    corners (as ``evaluation.outcomes`` passes them), the reasons matching gives."""
    from evaluation.engine import reasons
    from evaluation.engine.matching import match

    truth, dets = _random_pairs(1, 120, offset=100)
    loaded, predictions = _load("csv", tmp_path, truth, dets)
    whole = match(loaded, predictions, "voc")
    bare = match(loaded, predictions, "voc", reasons=False)
    order = bare.det_order
    reasons.attach(bare, loaded, predictions.boxes[order], "voc", predictions.corners[order])
    assert bare.det_reason.tolist() == whole.det_reason.tolist()
    assert bare.gt_reason.tolist() == whole.gt_reason.tolist()
    assert (bare.det_reason == reasons.DETECTION_REASONS.index("tp")).sum() > 0
