"""Label folders and zips: every error names the file, the member and its line (and
the field); hostile archives and XML are refused (zip bombs, path traversal, symbolic
links out of the folder, entity expansion and external entities, the attacks the
Python documentation's "XML vulnerabilities" table lists for expat-based parsers)."""

import io
import json
import os
import re
import zipfile

import numpy as np
import pytest

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.loaders import members
from evaluation.engine.loaders.image_sizes import size_from_header

from . import label_writers as write

IMAGES = {1: (1024, 512), 2: (1024, 512)}
CLASSES = ["Car", "Pedestrian"]
BOXES = [(1, "Car", [100.0, 200.0, 150.0, 80.0], {}), (2, "Pedestrian", [5.0, 6.0, 7.0, 8.0], {})]
KITTI_LINE = "Car 0.00 0 -1.5 100.00 200.00 250.00 280.00 1.5 1.6 3.9 1.0 2.0 30.0 0.1"


def _zip(path, entries):
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as z:
        for name, data in entries.items():
            z.writestr(name, data)
    return path


def _refused(pattern, *args, **kwargs):
    with pytest.raises(InputError, match=pattern) as caught:
        load_truth(*args, **kwargs)
    return caught.value


# Archives ---------------------------------------------------------------------------


def test_zip_bomb_member_is_cut_off(tmp_path):
    # 17 MB of zeros compress to ~17 kB; the cap counts decompressed bytes
    bomb = _zip(tmp_path / "bomb.zip", {"000001.txt": KITTI_LINE + "\n" + " " * (17 << 20)})
    assert os.path.getsize(bomb) < 100_000
    error = _refused(r"larger than 16 MB", bomb, fmt="kitti")
    assert error.record == "000001.txt"


def test_total_label_text_is_capped(tmp_path, monkeypatch):
    monkeypatch.setattr(members, "MAX_TOTAL_BYTES", 150)
    archive = _zip(tmp_path / "many.zip", {f"{i:06d}.txt": KITTI_LINE + "\n" for i in range(3)})
    _refused(r"of label text: refused", archive, fmt="kitti")


@pytest.mark.parametrize("name", ["../evil.txt", "/etc/evil.txt", "a/../../evil.txt", "C:x.txt"])
def test_member_names_leaving_the_archive_are_refused(tmp_path, name):
    archive = _zip(tmp_path / "t.zip", {"000001.txt": KITTI_LINE + "\n", name: KITTI_LINE})
    error = _refused(r"leaves the archive", archive)
    assert error.record == name


def test_symbolic_links(tmp_path):
    folder = write.kitti(tmp_path / "k", IMAGES, CLASSES, BOXES)
    outside = tmp_path / "outside.txt"
    outside.write_text(KITTI_LINE + "\n")
    (folder / "000003.txt").symlink_to(outside)
    error = _refused(r"symbolic link pointing outside", folder)
    assert error.record == "000003.txt"
    (folder / "000003.txt").unlink()
    (folder / "000004.txt").symlink_to(folder / "000001.txt")  # inside: read
    assert load_truth(folder).n_boxes == 3
    info = zipfile.ZipInfo("000005.txt")
    info.external_attr = 0o120777 << 16  # a symlink entry
    archive = tmp_path / "link.zip"
    with zipfile.ZipFile(archive, "w") as z:
        z.writestr("000001.txt", KITTI_LINE + "\n")
        z.writestr(info, "/etc/passwd")
    _refused(r"symbolic link inside the archive", archive)


def test_os_metadata_is_skipped(tmp_path):
    archive = _zip(
        tmp_path / "mac.zip",
        {"labels/000001.txt": KITTI_LINE + "\n", "__MACOSX/labels/._000001.txt": b"\x00\x05\x16"},
    )
    assert load_truth(archive).n_boxes == 1


def test_corrupted_member(tmp_path):
    archive = _zip(tmp_path / "c.zip", {"000001.txt": (KITTI_LINE + "\n") * 50})
    data = bytearray(archive.read_bytes())
    start = data.index(b"000001.txt") + len("000001.txt")  # the local header's name
    data[start + 5 : start + 25] = bytes(20)  # into the deflated bytes
    archive.write_bytes(bytes(data))
    error = _refused(r"cannot read", archive, fmt="kitti")
    assert error.record == "000001.txt"


def test_not_a_zip_and_unknown_format(tmp_path):
    folder = write.kitti(tmp_path / "k", IMAGES, CLASSES, BOXES)
    _refused(r"unknown format 'darknet'", folder, fmt="darknet")
    single = tmp_path / "one.txt"
    single.write_text(KITTI_LINE)
    _refused(r"a kitti split or detection set is a folder or a zip", single, fmt="kitti")
    empty = tmp_path / "empty"
    empty.mkdir()
    _refused(r"cannot tell the format", empty)


# XML ----------------------------------------------------------------------------------

LAUGHS = """<?xml version="1.0"?>
<!DOCTYPE lolz [<!ENTITY lol "lol"><!ENTITY lol2 "&lol;&lol;&lol;&lol;&lol;&lol;&lol;">
<!ENTITY lol3 "&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;">]>
<annotation><object><name>&lol3;</name></object></annotation>"""
EXTERNAL = """<?xml version="1.0"?>
<!DOCTYPE a [<!ENTITY xxe SYSTEM "file:///etc/passwd">]>
<annotation><object><name>&xxe;</name></object></annotation>"""
PARAMETER = """<?xml version="1.0"?>
<!DOCTYPE a [<!ENTITY % remote SYSTEM "http://127.0.0.1:9/x.dtd"> %remote;]>
<annotation/>"""


@pytest.mark.parametrize("xml", [LAUGHS, EXTERNAL, PARAMETER], ids=["laughs", "xxe", "param"])
def test_xml_entities_are_refused(tmp_path, xml):
    folder = tmp_path / "voc"
    folder.mkdir()
    (folder / "000001.xml").write_text(xml)
    error = _refused(r"declares entities", folder)
    assert error.record.startswith("000001.xml line ")


@pytest.mark.parametrize(
    "encoding, reason",
    [
        ("klingon", "unknown encoding: klingon"),
        ("utf-7", "multi-byte encodings are not supported"),
        ("rot13", "'rot13' is not a text encoding"),
    ],
)
def test_an_xml_encoding_the_parser_cannot_read_is_refused(tmp_path, encoding, reason):
    """expat reads UTF-8, UTF-16, ISO-8859-1 and ASCII itself and asks Python's codecs
    for any other declared encoding (xml.parsers.expat documentation); one they cannot
    give is a refusal naming the member, not a LookupError."""
    folder = tmp_path / "voc"
    folder.mkdir()
    (folder / "000001.xml").write_text(
        f'<?xml version="1.0" encoding="{encoding}"?>\n<annotation></annotation>'
    )
    error = _refused(rf"the XML declares the encoding '{encoding}'", folder)
    assert (error.path, error.record, error.field) == (str(folder), "000001.xml line 1", "encoding")
    assert reason in error.message


def test_xml_errors_name_member_line_and_field(tmp_path):
    folder = write.voc(tmp_path / "voc", IMAGES, CLASSES, BOXES)
    path = folder / "Annotations" / "2.xml"
    path.write_text(path.read_text().replace("<xmax>12.0</xmax>", "<xmax>twelve</xmax>"))
    error = _refused(r"expected a number, got 'twelve'", folder)
    assert (error.record, error.field) == ("Annotations/2.xml line 1", "bndbox/xmax")
    path.write_text("<annotation>\n<object>\n</annotation>")
    error = _refused(r"not well-formed XML: mismatched tag", folder)
    assert error.record == "Annotations/2.xml line 3"
    path.write_text(
        "<annotation><object><name>Car</name><truncated>2</truncated>"
        "<bndbox><xmin>1</xmin><ymin>1</ymin><xmax>2</xmax><ymax>2</ymax></bndbox>"
        "</object></annotation>"
    )
    error = _refused(r"expected 0 or 1, got '2'", folder)
    assert error.field == "truncated"


@pytest.mark.parametrize("written", ["1_2", "١٢", "１２", "0x0C", "12.0.0"])
def test_xml_numbers_take_ascii_digits_only(tmp_path, written):
    """Python's ``float`` reads "1_2" and other scripts' digits ("١٢" is 12: its
    documentation, from memory); a VOC XML coordinate written so is refused naming the
    member, line and field, not read as 12 (the devkit's files write ASCII decimals)."""
    folder = write.voc(tmp_path / "voc", IMAGES, CLASSES, BOXES)
    path = folder / "Annotations" / "2.xml"
    path.write_text(path.read_text().replace("<xmax>12.0</xmax>", f"<xmax>{written}</xmax>"))
    error = _refused("expected a number", folder)
    assert (error.record, error.field) == ("Annotations/2.xml line 1", "bndbox/xmax")


@pytest.mark.parametrize("written", ["\xa012.0", "12.0\u3000", "\u200312.0", "\x8512.0"])
def test_xml_numbers_take_ascii_spaces_only(tmp_path, written):
    """Spaces around a VOC XML number are C's whitespace only (the devkit's files write
    ASCII; C standard ``isspace`` in the "C" locale: space, \\t, \\n, \\v, \\f, \\r,
    from memory): a no-break space, an ideographic or em space, or NEL beside the
    digits is refused naming member, line and field (red team audit11 F7, case
    voc_nbsp); Python's ``re`` ``\\s`` and ``float`` take them as spaces."""
    folder = write.voc(tmp_path / "voc", IMAGES, CLASSES, BOXES)
    path = folder / "Annotations" / "2.xml"
    text = path.read_text()
    path.write_text(text.replace("<xmax>12.0</xmax>", f"<xmax>{written}</xmax>"))
    error = _refused("expected a number", folder)
    assert (error.record, error.field) == ("Annotations/2.xml line 1", "bndbox/xmax")
    path.write_text(text.replace("<xmax>12.0</xmax>", "<xmax> \t12.0\r\n </xmax>"))
    assert load_truth(folder).boxes[1].tolist() == [5.0, 6.0, 7.0, 8.0]


# KITTI and YOLO lines --------------------------------------------------------------


@pytest.mark.parametrize(
    "line, message, field",
    [
        (KITTI_LINE.replace("200.00", "2OO"), r"expected a number, got '2OO'", "y1"),
        (KITTI_LINE.replace("200.00", "1_000"), r"expected a number, got '1_000'", "y1"),
        (KITTI_LINE.replace(" 0 -1.5", " 1.5 -1.5"), r"expected an integer", "occluded"),
        (KITTI_LINE.rsplit(" ", 1)[0], r"expected 15 fields", ""),
        (KITTI_LINE + " 0.9", r"16 fields: a ground-truth line has 15", ""),
    ],
)
def test_kitti_line_errors(tmp_path, line, message, field):
    archive = _zip(tmp_path / "k.zip", {"000001.txt": KITTI_LINE + "\n\n" + line + "\n"})
    error = _refused(message, archive, fmt="kitti")
    assert (error.path, error.record, error.field) == (str(archive), "000001.txt line 3", field)


@pytest.mark.parametrize(
    "old, new, message, field",
    [
        # Arabic-Indic three: float("٣00.00") is 300.0, int("٣") is 3 (Python's str
        # numeric conversions); C's strtod/fscanf, which the KITTI devkit reads with,
        # take ASCII digits only (C standard, from memory)
        ("200.00", "٣00.00", r"expected a number, got '٣00.00'", "y1"),
        ("200.00", "２00.00", r"expected a number, got '２00.00'", "y1"),  # full-width 2
        (" 0 -1.5", " ٣ -1.5", r"expected an integer, got '٣'", "occluded"),
        ("200.00", "2²", r"expected a number, got '2²'", "y1"),  # superscript: float refuses
    ],
)
def test_kitti_numbers_take_ascii_digits_only(tmp_path, old, new, message, field):
    """Label-line numbers match ``[0-9]``, not ``\\d`` (Python's ``re`` docs: ``\\d``
    matches any Unicode decimal digit; from memory): a coordinate written in another
    script's digits is refused naming file, line and field, not read as 300."""
    line = KITTI_LINE.replace(old, new)
    archive = _zip(tmp_path / "k.zip", {"000001.txt": KITTI_LINE + "\n" + line + "\n"})
    error = _refused(message, archive, fmt="kitti")
    assert (error.path, error.record, error.field) == (str(archive), "000001.txt line 2", field)


def test_yolo_numbers_take_ascii_digits_only(tmp_path):
    """A YOLO class index or coordinate in Arabic-Indic digits is refused (``int("١")``
    would make it class 1), and so is a ``names:`` key in them (YAML reads ``١`` as
    text, not 1: YAML 1.2 core schema's int pattern ``[-+]?[0-9]+``, from memory)."""
    _, table = write.csv(tmp_path / "csv", IMAGES, CLASSES, BOXES)
    folder = write.yolo(tmp_path / "y", IMAGES, CLASSES, BOXES)
    label = folder / "labels" / "2.txt"
    for text, message, field in (
        ("١ 0.5 0.5 0.25 0.1\n", r"expected an integer, got '١'", "class"),
        ("1 0.5 0.٥ 0.25 0.1\n", r"expected a number, got '0.٥'", "cy"),
    ):
        label.write_text(text)
        error = _refused(message, folder, images=table, fmt="yolo")
        assert (error.record, error.field) == ("labels/2.txt line 1", field)
    label.write_text("1 0.5 0.5 0.25 0.1\n")
    (folder / "classes.txt").unlink()
    (folder / "data.yaml").write_text("names:\n  0: Car\n  ١: Pedestrian\n")
    error = _refused(r"class index is written in the digits 0-9, got '١'", folder, images=table)
    assert (error.record, error.field) == ("data.yaml line 3", "names")


#: Separators Python's ``str.split()`` takes and C's ``isspace`` in the "C" locale does
#: not (C standard: space, \t, \n, \v, \f, \r only; from memory): no-break space,
#: ideographic space, em space, NEL, the file separator \x1c (``str.splitlines`` also
#: breaks lines at the last two).
NOT_C_SPACES = ["\xa0", "\u3000", "\u2003", "\x85", "\x1c"]


@pytest.mark.parametrize("space", NOT_C_SPACES)
def test_kitti_fields_split_at_c_whitespace_only(tmp_path, space):
    """The KITTI devkit reads label files with ``fscanf`` (``%s``, ``%lf``), whose
    separators are C whitespace (red team audit11 F7: ``Car<NBSP>0.00 ...`` was read as
    a Car): such a character stays inside its field, and the line is refused naming
    file, line and field. \\t, \\v, \\f between fields are C whitespace: read."""
    line = KITTI_LINE.replace("Car ", "Car" + space, 1)
    archive = _zip(tmp_path / "k.zip", {"000001.txt": KITTI_LINE + "\n" + line + "\n"})
    error = _refused(r"expected 15 fields .*got 14", archive, fmt="kitti")
    assert (error.path, error.record) == (str(archive), "000001.txt line 2")
    line = KITTI_LINE.replace(" 0 -1.5", space + " 0 -1.5", 1)
    archive = _zip(tmp_path / "k2.zip", {"000001.txt": KITTI_LINE + "\n" + line + "\n"})
    message = "expected a number, got " + re.escape(repr("0.00" + space))
    error = _refused(message, archive, fmt="kitti")
    assert (error.record, error.field) == ("000001.txt line 2", "truncated")
    line = KITTI_LINE.replace(" ", "\t").replace("\t0 ", "\v0\f", 1)
    archive = _zip(tmp_path / "k3.zip", {"000001.txt": KITTI_LINE + "\n" + line + "\r\n"})
    truth = load_truth(archive, fmt="kitti")
    assert truth.boxes.tolist() == [[100.0, 200.0, 150.0, 80.0]] * 2


@pytest.mark.parametrize("space", NOT_C_SPACES)
def test_yolo_fields_split_at_c_whitespace_only(tmp_path, space):
    """YOLO label lines are split as KITTI's: at C whitespace only (common practice for
    the YOLO tools' whitespace-separated files; C standard ``isspace``, from memory)."""
    _, table = write.csv(tmp_path / "csv", IMAGES, CLASSES, BOXES)
    folder = write.yolo(tmp_path / "y", IMAGES, CLASSES, BOXES)
    label = folder / "labels" / "2.txt"
    label.write_text("1 0.5" + space + "0.5 0.25 0.1\n")
    error = _refused(r"expected 5 fields .*got 4", folder, images=table, fmt="yolo")
    assert error.record == "labels/2.txt line 1"


def test_kitti_detections_need_the_score(tmp_path):
    truth = load_truth(_zip(tmp_path / "k.zip", {"000001.txt": KITTI_LINE + "\n"}))
    det = _zip(tmp_path / "d.zip", {"000001.txt": KITTI_LINE + "\n"})
    with pytest.raises(InputError, match=r"expected 16 fields") as caught:
        load_predictions(det, truth, fmt="kitti")
    assert caught.value.record == "000001.txt line 1"
    det = _zip(tmp_path / "d2.zip", {"000009.txt": KITTI_LINE + " 0.5\n"})
    with pytest.raises(InputError, match=r"image '000009' is not in the split") as caught:
        load_predictions(det, truth)
    assert caught.value.record == "000009.txt line 1"
    # the devkit compares types case-insensitively: 'car' is the split's 'Car'
    det = _zip(tmp_path / "d3.zip", {"000001.txt": KITTI_LINE.replace("Car", "car") + " 0.5\n"})
    assert load_predictions(det, truth).cls.tolist() == [0]


def test_yolo_errors(tmp_path):
    _, table = write.csv(tmp_path / "csv", IMAGES, CLASSES, BOXES)
    folder = write.yolo(tmp_path / "y", IMAGES, CLASSES, BOXES)
    label = folder / "labels" / "2.txt"
    label.write_text("1 0.5 0.5 1.25 0.1\n")
    error = _refused(r"lie within 0-1, got 1.25", folder, images=table, fmt="yolo")
    assert (error.record, error.field) == ("labels/2.txt line 1", "w")
    label.write_text("2 0.5 0.5 0.25 0.1\n")
    error = _refused(
        r"class index 2 is not in the class-name file \(0 to 1\)", folder, images=table
    )
    assert (error.record, error.field) == ("labels/2.txt line 1", "class")
    label.write_text("1 0.5 0.5 0.25 0.1\n")
    error = _refused(r"needs its width and height", folder)  # no table, no image files
    assert error.record == "labels/1.txt"
    (folder / "classes.txt").unlink()
    _refused(r"needs its class names", folder, fmt="yolo")


def test_yolo_names_from_yaml(tmp_path):
    _, table = write.csv(tmp_path / "csv", IMAGES, CLASSES, BOXES)
    folder = write.yolo(tmp_path / "y", IMAGES, CLASSES, BOXES, names_file=False)
    for text in (
        "names: [Car, Pedestrian]\n",
        "nc: 2\nnames:\n  - Car\n  - 'Pedestrian'\n",
        "path: x\nnames:\n  0: Car\n  1: Pedestrian  # people\nval: y\n",
    ):
        (folder / "data.yaml").write_text(text)
        assert load_truth(folder, images=table, fmt="yolo").classes == tuple(CLASSES)


def test_labels_must_be_in_the_images_table(tmp_path):
    _, table = write.csv(tmp_path / "csv", IMAGES, CLASSES, BOXES)
    folder = write.kitti(tmp_path / "k", IMAGES, CLASSES, BOXES)
    (folder / "000003.txt").write_text("")
    error = _refused(r"image '000003' is not in the images table", folder, images=table)
    assert error.record == "000003.txt"


def test_two_files_for_one_image(tmp_path):
    folder = write.kitti(tmp_path / "k", IMAGES, CLASSES, BOXES)
    (folder / "1.txt").write_text(KITTI_LINE + "\n")
    error = _refused(r"two label files for one image \(000001.txt and 1.txt\)", folder)
    assert error.record == "1.txt"


def test_kitti_training_folder_reads_only_its_labels(tmp_path):
    archive = _zip(
        tmp_path / "training.zip",
        {
            "training/label_2/000001.txt": KITTI_LINE + "\n",
            "training/calib/000001.txt": "P0: 1 0 0 0 0 1 0 0 0 0 1 0\n",
        },
    )
    assert load_truth(archive).n_boxes == 1


# Attributes in COCO JSON and CSV ------------------------------------------------------


def _coco(tmp_path, annotation_changes=None, regions=None):
    data = {
        "images": [{"id": 1, "width": 640, "height": 480}],
        "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4]}],
        "categories": [{"id": 1, "name": "Car"}],
    }
    data["annotations"][0].update(annotation_changes or {})
    if regions is not None:
        data["dont_care"] = regions
    path = tmp_path / "t.json"
    path.write_text(json.dumps(data))
    return path


@pytest.mark.parametrize(
    "changes, regions, message, record, field",
    [
        ({"visibility": 1.5}, None, r"within 0-1, got 1.5", "annotations[0]", "visibility"),
        ({"occlusion": 0.5}, None, r"integer level .* got 0.5", "annotations[0]", "occlusion"),
        ({"truncation": "half"}, None, r"expected 'float \| null'", "annotations[0]", "truncation"),
        (
            {},
            [{"image_id": 9, "bbox": [0, 0, 1, 1]}],
            r"image 9 is not in",
            "dont_care[0]",
            "image_id",
        ),
        (
            {},
            [{"image_id": 1, "bbox": [0, 0, -1, 1]}],
            r"width and height must be >= 0",
            "dont_care[0]",
            "bbox",
        ),
    ],
)
def test_coco_attribute_errors(tmp_path, changes, regions, message, record, field):
    """Refused under ``strict``; by default left unread and counted, since pycocotools
    2.0.11 never reads these keys and scores such a file."""
    path = _coco(tmp_path, changes, regions)
    error = _refused(message, path, annotations="strict")
    assert (error.record, error.field) == (record, field)
    truth = load_truth(path)
    counts = truth.box_counts
    assert counts["unread_attributes"] + counts["unread_dont_care"] == 1
    assert len(truth.regions) == 0 and np.isnan(truth.visibility).all()
    assert np.isnan(truth.occlusion).all() and np.isnan(truth.truncation).all()


def test_csv_attribute_errors_and_dont_care_rows(tmp_path):
    images = tmp_path / "images.csv"
    images.write_text("image_id,width,height\n1,640,480\n")
    boxes = tmp_path / "boxes.csv"
    boxes.write_text(
        "image_id,label,x_min,y_min,x_max,y_max,visibility,dont_care\n"
        "1,Car,1,2,4,6,0.5,0\n1,,10,10,20,20,,1\n1,Car,1,2,4,6,x,0\n"
    )
    error = _refused(r"expected a number, got 'x'", boxes, images=images)
    assert (error.record, error.field) == ("line 4", "visibility")
    boxes.write_text(
        "image_id,label,x_min,y_min,x_max,y_max,visibility,dont_care\n"
        "1,Car,1,2,4,6,0.5,0\n1,,10,10,20,20,,1\n2,whatever,0,0,1,1,,1\n"
    )
    error = _refused(r"image 2 is not in the split", boxes, images=images)
    assert (error.record, error.field) == ("line 4", "image_id")
    boxes.write_text(
        "image_id,label,x_min,y_min,x_max,y_max,visibility,dont_care\n"
        "1,Car,1,2,4,6,0.5,0\n1,,10,10,20,20,,1\n"
    )
    truth = load_truth(boxes, images=images)
    assert truth.classes == ("Car",) and truth.n_boxes == 1
    assert truth.regions.tolist() == [[10, 10, 10, 10]] and truth.visibility.tolist() == [0.5]


# Image headers, checked against Pillow (a reference image library) ------------------


@pytest.mark.parametrize(
    "fmt, options",
    [
        ("PNG", {}),
        ("JPEG", {}),
        ("JPEG", {"progressive": True}),
        ("BMP", {}),
        ("GIF", {}),
    ],
)
def test_image_sizes_match_pillow(fmt, options):
    pil = pytest.importorskip("PIL.Image")
    for size in ((1, 1), (1242, 375), (640, 4000)):
        buffer = io.BytesIO()
        pil.new("RGB", size, (10, 20, 30)).save(buffer, fmt, **options)
        data = buffer.getvalue()
        assert pil.open(io.BytesIO(data)).size == size
        assert tuple(size_from_header(data[: members.HEADER_BYTES])) == size
    assert size_from_header(b"not an image") is None


def test_truth_keeps_images_without_labels(tmp_path):
    pil = pytest.importorskip("PIL.Image")
    folder = write.kitti(tmp_path / "k", {1: (64, 32)}, CLASSES, [])
    pil.new("RGB", (64, 48)).save(folder / "000002.jpg")
    truth = load_truth(folder, fmt="kitti")
    assert truth.image_ids.tolist() == [1, 2]
    np.testing.assert_array_equal(truth.image_height, [np.nan, 48])
