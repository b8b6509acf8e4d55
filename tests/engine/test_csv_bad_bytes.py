"""A byte that is not UTF-8 in a CSV file (detections, ground-truth boxes, images table)
is named at its own line, column and field, wherever it sits: early, at the text
layer's buffer boundary (8192 bytes: ``io.TextIOWrapper`` decodes a chunk ahead of the
csv reader), late in a large file. The expected line and column are counted on the
raw bytes here, independently of the engine (lines as ``csv.reader`` counts them over
text mode with ``newline=""``: Python's ``csv`` and ``io`` documentation)."""

import csv
import re

import pytest

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.loaders import csv_tables

NOTE = "n" * 60  # an extra column (ignored by the loaders) to place the byte in
KINDS = {
    "detections": ("image_id,label,x_min,y_min,x_max,y_max,score,note", "f1,car,1,2,30,40,0.5"),
    "boxes": ("image_id,label,x_min,y_min,x_max,y_max,note", "f1,car,1,2,30,40"),
    "images": ("image_id,width,height,note", None),
}
IMAGES = "image_id,width,height\nf1,1280,720\n"
BOXES = "image_id,label,x_min,y_min,x_max,y_max\nf1,car,1,2,30,40\n"


def _rows(kind, n, pad):
    header, row = KINDS[kind]
    lines = [header]
    for k in range(n):
        start = row if row is not None else f"i{k},1280,720"
        lines.append(f"{start},{NOTE}{'p' * pad if k == 0 else ''}")
    return ("\n".join(lines) + "\n").encode()


def _with_bad_byte(kind, offset):
    """The file's bytes with 0xE9 (Latin-1 'é') at ``offset``, inside a note cell (the
    first row's note padded until the offset falls in a note)."""
    for pad in range(80):
        data = bytearray(_rows(kind, offset // 70 + 20, pad))
        start = data.rfind(b"\n", 0, offset) + 1
        end = data.find(b"\n", offset)
        if start > 0 and data.rfind(b",", start, end) < offset < end:
            data[offset] = 0xE9
            return bytes(data)
    raise AssertionError("offset not placeable")


def _expected(data, offset):
    """Line and column of the byte at ``offset``, counted on the raw bytes."""
    head = data[:offset]
    line = len(re.findall(rb"\r\n|\r|\n", head)) + 1
    start = max(head.rfind(b"\n"), head.rfind(b"\r")) + 1
    return line, len(head[start:].decode("utf-8")) + 1


def _load(tmp_path, kind, data):
    path = tmp_path / f"{kind}.csv"
    path.write_bytes(data)
    if kind == "images":
        boxes = tmp_path / "boxes.csv"
        boxes.write_text(BOXES.replace("f1,", "i0,"))
        return load_truth(boxes, images=path)
    if kind == "boxes":
        images = tmp_path / "images.csv"
        images.write_text(IMAGES)
        return load_truth(path, images=images)
    boxes, images = tmp_path / "boxes.csv", tmp_path / "images.csv"
    boxes.write_text(BOXES)
    images.write_text(IMAGES)
    return load_predictions(path, load_truth(boxes, images=images))


@pytest.mark.parametrize("kind", list(KINDS))
@pytest.mark.parametrize(
    "offset",
    [100, 8191, 8192, 8193, 16_384, 1_400_000],
    ids=["early", "boundary-1", "boundary", "boundary+1", "second-boundary", "late"],
)
def test_a_bad_byte_is_named_at_its_line_column_and_field(tmp_path, monkeypatch, kind, offset):
    # small blocks: in the large file, blocks are handed on before the byte is reached
    monkeypatch.setattr(csv_tables, "BLOCK_ROWS", 1000)
    data = _with_bad_byte(kind, offset)
    line, column = _expected(data, offset)
    assert line > 1
    with pytest.raises(InputError) as error:
        _load(tmp_path, kind, data)
    e = error.value
    assert (e.path, e.record, e.field) == (str(tmp_path / f"{kind}.csv"), f"line {line}", "note")
    assert e.message == f"not UTF-8 text (byte 0xE9 at column {column}); save it as UTF-8"


@pytest.mark.parametrize("kind", list(KINDS))
@pytest.mark.parametrize("offset", [8191, 8192])
def test_a_character_across_the_buffer_boundary_is_read(tmp_path, kind, offset):
    """'é' as UTF-8 (C3 A9) split by the text layer's chunk boundary is one character."""
    data = bytearray(_with_bad_byte(kind, offset))
    data[offset : offset + 2] = "é".encode()
    _load(tmp_path, kind, bytes(data))  # no error


def _read(tmp_path, data):
    path = tmp_path / "t.csv"
    path.write_bytes(data)
    with pytest.raises(InputError) as error:
        list(csv_tables.read_blocks(path, ("image_id",)))
    return error.value


@pytest.mark.parametrize("newline", [b"\n", b"\r\n", b"\r"])
def test_every_line_ending_counts_as_the_csv_reader_counts_it(tmp_path, newline):
    rows = [b"image_id,note"] + [b"i%d,x" % k for k in range(3000)]
    rows[2500] = b"i2500,caf\xe9"
    e = _read(tmp_path, newline.join(rows) + newline)
    assert (e.record, e.field) == ("line 2501", "note")
    assert e.message.startswith("not UTF-8 text (byte 0xE9 at column 10)")


def test_a_bad_byte_inside_a_quoted_cell_over_lines_names_its_own_line(tmp_path):
    """A quoted cell spanning lines: the line of the byte, not of the record's start,
    and the field of the cell (followed by the csv reader)."""
    rows = b"image_id,note,other\n" + b"i1,x,y\n" * 4000
    rows += b'i2,"first\nsecond caf\xe9\nthird",y\n' + b"i3,x,y\n"
    e = _read(tmp_path, rows)
    assert (e.record, e.field) == ("line 4003", "note")
    assert e.message.startswith("not UTF-8 text (byte 0xE9 at column 11)")


def test_a_bad_byte_in_the_header_after_a_byte_order_mark(tmp_path):
    """The header has no field names to give: the line and cell; the mark is no column."""
    e = _read(tmp_path, b"\xef\xbb\xbfimage_id,n\xe9te\ni1,x\n")
    assert (e.record, e.field) == ("line 1 (the header)", "")
    assert e.message == "not UTF-8 text (byte 0xE9 at column 11, cell 2); save it as UTF-8"


def test_a_row_wider_than_the_header_names_the_cell(tmp_path):
    e = _read(tmp_path, b"image_id\n" + b"i1\n" * 3000 + b"i2,caf\xe9\n")
    assert (e.record, e.field) == ("line 3002", "")
    assert e.message == "not UTF-8 text (byte 0xE9 at column 7, cell 2); save it as UTF-8"


def test_a_malformed_record_before_the_byte_is_named_first(tmp_path, monkeypatch):
    """The first problem in file order is the one named (here a cell over the csv
    module's field size limit, a line before the bad byte)."""
    monkeypatch.setattr(csv_tables, "BLOCK_ROWS", 10)
    limit = csv.field_size_limit(100)
    try:
        rows = b"image_id\n" + b"i1\n" * 3000 + b"x" * 200 + b"\n" + b"caf\xe9\n"
        e = _read(tmp_path, rows)
    finally:
        csv.field_size_limit(limit)
    assert e.record == "line 3002" and e.message.startswith("malformed CSV: field larger")
