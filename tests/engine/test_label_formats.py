"""One split, five formats: COCO JSON, CSV, KITTI, YOLO and VOC XML give one content
hash and identical numbers; road attributes and don't-care regions survive the formats
that carry them; splits without them keep the hash they were frozen with.

Layouts: the KITTI object devkit's readme (15 fields per object, a 16th score for
detections), the YOLO label layout (``class cx cy w h [score]``, normalised), the VOC
devkit's annotation XML (Everingham et al., IJCV 2010).
"""

import json

import numpy as np
import pytest

from evaluation.engine import evaluate, load_predictions, load_truth

from . import label_writers as write

# Power-of-two sizes: YOLO's normalised coordinates (x / width) are then exact in
# binary floating point, so pixels come back bit for bit (see the last test for
# other sizes).
IMAGES = {1: (1024, 512), 2: (1024, 512), 7: (512, 256)}
CLASSES = ["Car", "Cyclist", "Pedestrian"]
BOXES = [
    (1, "Car", [100.0, 200.0, 150.0, 80.5], {}),
    (1, "Car", [400.0, 210.0, 60.0, 30.0], {}),
    (1, "Pedestrian", [700.5, 150.0, 30.0, 90.0], {}),
    (2, "Cyclist", [20.0, 40.0, 50.0, 100.0], {}),
    (2, "Car", [600.0, 300.0, 200.0, 120.0], {}),
]
DETECTIONS = [
    (1, "Car", [102.0, 198.0, 150.0, 82.0], 0.9),
    (1, "Car", [405.0, 212.0, 50.0, 30.0], 0.75),
    (1, "Car", [10.0, 10.0, 40.0, 40.0], 0.6),
    (1, "Pedestrian", [701.0, 152.0, 28.0, 88.0], 0.8),
    (2, "Cyclist", [25.0, 45.0, 50.0, 100.0], 0.7),
    (2, "Car", [590.0, 290.0, 210.0, 130.0], 0.85),
    (7, "Pedestrian", [100.0, 100.0, 20.0, 50.0], 0.5),
]
# The hash of tests' pin.json on main before road attributes existed (commit 511da67):
# a split without attributes must keep it.
PINNED = "104e41821db4b6b79fb71c10fb19cb5aa1bab62786a40bbcb5c4002cb361055d"


def _all_formats(root, boxes=BOXES, regions=(), detections=DETECTIONS):
    """{format: (truth, predictions)} for the same split written five ways."""
    csv_boxes, table = write.csv(root / "csv", IMAGES, CLASSES, boxes, regions)
    out = {
        "json": (
            load_truth(write.coco(root / "truth.json", IMAGES, CLASSES, boxes, regions)),
            write.coco(root / "det.json", IMAGES, CLASSES, boxes, detections=detections),
        ),
        "csv": (
            load_truth(csv_boxes, images=table),
            write.csv(root / "csvdet", IMAGES, CLASSES, boxes, detections=detections),
        ),
        "kitti": (
            load_truth(write.kitti(root / "kitti", IMAGES, CLASSES, boxes, regions), images=table),
            write.kitti(root / "kittidet", IMAGES, CLASSES, boxes, detections=detections),
        ),
        "yolo": (
            load_truth(write.yolo(root / "yolo", IMAGES, CLASSES, boxes), images=table),
            write.yolo(root / "yolodet", IMAGES, CLASSES, boxes, detections=detections),
        ),
        "voc": (load_truth(write.voc(root / "voc", IMAGES, CLASSES, boxes)), None),
    }
    return out


def test_five_formats_one_hash_and_identical_numbers(tmp_path):
    formats = _all_formats(tmp_path)
    hashes = {name: truth.content_hash() for name, (truth, _) in formats.items()}
    assert len(set(hashes.values())) == 1, hashes
    reference = formats["json"][0]
    for name, (truth, _) in formats.items():
        assert truth.classes == tuple(CLASSES), name
        np.testing.assert_array_equal(truth.boxes, reference.boxes, err_msg=name)
        np.testing.assert_array_equal(truth.image_width, reference.image_width, err_msg=name)
    # Every truth with every detection format (VOC XML holds ground truth only).
    results = {}
    for truth_name, (truth, _) in formats.items():
        for det_name, (_, det_path) in formats.items():
            if det_path is None:
                continue
            predictions = load_predictions(det_path, truth)
            for protocol in ("coco", "voc", "recall40"):
                result = evaluate(truth, predictions, protocol)
                results[(truth_name, det_name, protocol)] = json.dumps(result, sort_keys=True)
    for protocol in ("coco", "voc", "recall40"):
        texts = {v for (_, _, p), v in results.items() if p == protocol}
        assert len(texts) == 1, protocol
    # the numbers are real: scored, neither empty nor perfect
    coco = json.loads(results[("kitti", "yolo", "coco")])
    assert coco["counts"]["predictions"] == 7 and coco["counts"]["truth_boxes"] == 5
    assert 0 < coco["summary"]["AP"] < 1


def test_zip_reads_as_the_folder(tmp_path):
    _, table = write.csv(tmp_path / "csv", IMAGES, CLASSES, BOXES)
    folder = write.kitti(tmp_path / "k", IMAGES, CLASSES, BOXES, zip_to=None)
    zipped = write.kitti(tmp_path / "k2", IMAGES, CLASSES, BOXES, zip_to=tmp_path / "k.zip")
    a = load_truth(folder, images=table)
    b = load_truth(zipped, images=table)
    assert a.content_hash() == b.content_hash()


def test_attributes_and_dont_care_survive_json_csv_kitti(tmp_path):
    boxes = [
        (1, "Car", [100.0, 200.0, 150.0, 80.5], {"occlusion": 0, "truncation": 0.0}),
        (1, "Car", [400.0, 210.0, 60.0, 30.0], {"occlusion": 2, "truncation": 0.25}),
        (1, "Pedestrian", [700.5, 150.0, 30.0, 90.0], {"occlusion": 1, "truncation": 0.5}),
        (2, "Cyclist", [20.0, 40.0, 50.0, 100.0], {"occlusion": 3, "truncation": 0.0}),
        (2, "Car", [600.0, 300.0, 200.0, 120.0], {"occlusion": 0, "truncation": 0.75}),
    ]
    regions = [(1, [900.0, 100.0, 100.0, 50.0]), (7, [0.0, 0.0, 64.0, 32.0])]
    formats = _all_formats(tmp_path, boxes, regions)
    carrying = {n: formats[n][0] for n in ("json", "csv", "kitti")}
    hashes = {n: t.content_hash() for n, t in carrying.items()}
    assert len(set(hashes.values())) == 1, hashes
    plain = formats["yolo"][0]  # YOLO carries no attributes: a different split
    assert plain.content_hash() != hashes["json"]
    truth = carrying["kitti"]
    assert sorted(truth.occlusion.tolist()) == [0, 0, 1, 2, 3]
    assert truth.regions.tolist() == [[900.0, 100.0, 100.0, 50.0], [0.0, 0.0, 64.0, 32.0]]
    assert [truth.image_ids[i] for i in truth.region_image] == [1, 7]
    # a changed attribute or region changes the hash
    moved = [(1, [900.0, 100.0, 100.0, 51.0]), regions[1]]
    other = load_truth(write.coco(tmp_path / "moved.json", IMAGES, CLASSES, boxes, moved))
    assert other.content_hash() != hashes["json"]


def test_visibility_and_voc_flags(tmp_path):
    boxes = [
        (1, "Car", [100.0, 200.0, 150.0, 80.5], {"difficult": 1, "truncation": 1.0}),
        (1, "Pedestrian", [700.5, 150.0, 30.0, 90.0], {"occlusion": 1, "difficult": 0}),
        (2, "Cyclist", [20.0, 40.0, 50.0, 100.0], {"truncation": 0.0, "occlusion": 0}),
    ]
    formats = _all_formats(tmp_path, boxes)
    hashes = {n: formats[n][0].content_hash() for n in ("json", "csv", "voc")}
    assert len(set(hashes.values())) == 1, hashes
    truth = formats["voc"][0]
    assert truth.difficult.tolist() == [True, False, False]
    np.testing.assert_array_equal(truth.truncation, [1.0, np.nan, 0.0])
    visible = [(1, "Pedestrian", [700.5, 150.0, 30.0, 90.0], {"visibility": 0.65})]
    a = load_truth(write.coco(tmp_path / "v.json", IMAGES, CLASSES, visible))
    csv_boxes, table = write.csv(tmp_path / "v", IMAGES, CLASSES, visible)
    b = load_truth(csv_boxes, images=table, classes=CLASSES)  # one label: name them all
    assert a.visibility.tolist() == [0.65] and a.content_hash() == b.content_hash()


def test_split_without_attributes_keeps_its_hash(tmp_path):
    data = {
        "images": [
            {"id": 1, "width": 640, "height": 480, "tags": ["night"]},
            {"id": 2, "width": 640, "height": 480},
        ],
        "annotations": [
            {"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 50, 80], "area": 4000},
            {"id": 2, "image_id": 2, "category_id": 2, "bbox": [100, 50, 200, 100], "iscrowd": 1},
            {"id": 3, "image_id": 2, "category_id": 1, "bbox": [1.5, 2.25, 30, 40], "difficult": 1},
        ],
        "categories": [{"id": 1, "name": "pedestrian"}, {"id": 2, "name": "car"}],
    }
    path = tmp_path / "pin.json"
    path.write_text(json.dumps(data))
    assert load_truth(path).content_hash() == PINNED
    data["annotations"][0]["occlusion"] = 0
    path.write_text(json.dumps(data))
    assert load_truth(path).content_hash() != PINNED


def test_detected_by_content_or_named(tmp_path):
    _, table = write.csv(tmp_path / "csv", IMAGES, CLASSES, BOXES)
    kitti = write.kitti(tmp_path / "k", IMAGES, CLASSES, BOXES)
    yolo = write.yolo(tmp_path / "y", IMAGES, CLASSES, BOXES)
    voc = write.voc(tmp_path / "v", IMAGES, CLASSES, BOXES)
    for path, fmt in ((kitti, "kitti"), (yolo, "yolo"), (voc, "voc")):
        named = load_truth(path, images=table if fmt != "voc" else None, fmt=fmt)
        sniffed = load_truth(path, images=table if fmt != "voc" else None)
        assert named.content_hash() == sniffed.content_hash()


def test_sizes_from_image_files(tmp_path):
    pil = pytest.importorskip("PIL.Image")
    folder = write.kitti(tmp_path / "k", IMAGES, CLASSES, BOXES)
    images = folder / "images"
    images.mkdir()
    for image_id, (w, h) in IMAGES.items():
        pil.new("RGB", (w, h)).save(images / f"{image_id:06d}.png")
    _, table = write.csv(tmp_path / "csv", IMAGES, CLASSES, BOXES)
    assert load_truth(folder).content_hash() == load_truth(folder, images=table).content_hash()
    no_sizes = load_truth(write.kitti(tmp_path / "bare", IMAGES, CLASSES, BOXES))
    assert np.isnan(no_sizes.image_width).all()  # KITTI needs none to be scored


def test_yolo_other_sizes_agree_to_rounding(tmp_path):
    """A YOLO file stores x / width: with a width of 1242 (not a power of two) the
    pixels come back within a few ulps, not bit for bit, so the hash may differ."""
    images = {1: (1242, 375)}
    boxes = [(1, "Car", [387.63, 181.54, 35.87, 24.56], {})]
    yolo = write.yolo(tmp_path / "y", images, ["Car"], boxes)
    _, table = write.csv(tmp_path / "csv", images, ["Car"], boxes)
    truth = load_truth(yolo, images=table)
    np.testing.assert_allclose(truth.boxes[0], boxes[0][2], rtol=0, atol=1e-9)


def test_cache_of_a_folder(tmp_path):
    _, table = write.csv(tmp_path / "csv", IMAGES, CLASSES, BOXES)
    folder = write.kitti(tmp_path / "k", IMAGES, CLASSES, BOXES, regions=[(1, [1, 2, 3, 4])])
    cache = tmp_path / "cache"
    first = load_truth(folder, images=table, cache_dir=cache)
    again = load_truth(folder, images=table, cache_dir=cache)
    assert first.content_hash() == again.content_hash()
    assert again.regions.tolist() == [[1, 2, 3, 4]]
    (folder / "000007.txt").write_text("Car 0.0 0 -10 1.0 2.0 30.0 40.0 1.5 1.6 3.9 1 2 30 0.1\n")
    changed = load_truth(folder, images=table, cache_dir=cache)
    assert changed.n_boxes == first.n_boxes + 1


def test_command_line_reads_label_folders(tmp_path, capsys):
    from evaluation.engine.__main__ import main

    _, table = write.csv(tmp_path / "csv", IMAGES, CLASSES, BOXES)
    truth = write.kitti(tmp_path / "k", IMAGES, CLASSES, BOXES, zip_to=tmp_path / "k.zip")
    det = write.yolo(tmp_path / "y", IMAGES, CLASSES, BOXES, detections=DETECTIONS)
    argv = ["score", "--truth", str(truth), "--images", str(table), "--predictions", str(det)]
    assert main([*argv, "--format", "json"]) == 0
    from_folders = json.loads(capsys.readouterr().out)
    reference = _all_formats(tmp_path / "ref")["json"]
    expected = evaluate(reference[0], load_predictions(reference[1], reference[0]), "coco")
    assert from_folders["summary"] == json.loads(json.dumps(expected))["summary"]
    assert main([*argv, "--predictions-format", "kitti"]) == 2
    assert "expected 16 fields" in capsys.readouterr().err
