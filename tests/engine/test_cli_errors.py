"""Inputs that once gave the command line a traceback: each now exits 2 with one
``error: ...`` line naming the file (and record and field where there is one), and
writes nothing half-way (common practice: an error a user can act on without opening a
debugger)."""

import csv
import io
import json
import os
import stat
import subprocess
import sys
import threading

import pytest

from evaluation.engine import export
from evaluation.engine.__main__ import main

IMAGE = {"id": 1, "width": 100, "height": 100}
CATEGORY = {"id": 1, "name": "a"}


def _box(ann_id, bbox, image_id=1, area=400):
    return {
        "id": ann_id,
        "image_id": image_id,
        "category_id": 1,
        "bbox": bbox,
        "area": area,
        "iscrowd": 0,
    }


def _cli(capsys, *args):
    """Exit code and stderr of ``python -m evaluation.engine ARGS`` (in-process)."""
    code = main([str(a) for a in args])
    return code, capsys.readouterr().err


def _split(files, annotations, name="truth.json"):
    return files.write(
        name, {"images": [IMAGE], "categories": [CATEGORY], "annotations": annotations}
    )


DET = [{"image_id": 1, "category_id": 1, "bbox": [10, 10, 20, 20], "score": 0.9}]


def test_reject_names_the_record_of_a_resolved_annotation(files, capsys):
    """A repeated id resolves to its last annotation (as pycocotools' index keeps it);
    ``--boxes reject`` then refuses its overhanging box by its place in the file."""
    truth = _split(files, [_box(1, [90, 10, 20, 20]), _box(1, [80, 10, 30, 20])])
    dt = files.write("dt.json", DET)
    code, err = _cli(capsys, "score", "--truth", truth, "--predictions", dt, "--boxes", "reject")
    assert code == 2
    assert f"error: {truth}: annotations[1]: field 'bbox': box [80.0, 10.0, 30.0, 20.0]" in err
    assert "box policy: reject" in err


def test_reject_names_the_area_of_a_kept_annotation_after_an_unlisted_image(files, capsys):
    """An annotation of an unlisted image is left out (pycocotools never scores it); the
    next one's negative area is refused under its own index."""
    truth = _split(files, [_box(2, [5, 5, 6, 6], image_id=7), _box(1, [10, 10, 20, 20], area=-1)])
    dt = files.write("dt.json", DET)
    code, err = _cli(capsys, "score", "--truth", truth, "--predictions", dt, "--boxes", "reject")
    assert code == 2
    assert f"error: {truth}: annotations[1]: field 'area': must be >= 0, got -1" in err


@pytest.mark.parametrize("name", ["r.csv", "r.jsonl"])
def test_records_out_of_a_split_without_annotations(files, capsys, name):
    """A split of background images only: every detection is a false positive related
    to no box (empty box id and class), and there are no box rows."""
    truth = _split(files, [])
    dt = files.write("dt.json", DET)
    out = files.root / name
    code, err = _cli(capsys, "score", "--truth", truth, "--predictions", dt, "--records-out", out)
    assert (code, err) == (0, "")
    text = out.read_text()
    if name.endswith(".csv"):
        rows = list(csv.DictReader(io.StringIO(text)))
    else:
        rows = [json.loads(line) for line in text.splitlines()]
    assert len(rows) == 1
    row = rows[0]
    assert (row["row"], row["outcome"], row["reason"]) == ("detection", "fp", "fp_background")
    assert row["box_id"] in ("", None) and row["related_class"] in ("", None)


def test_a_csv_split_of_a_header_and_no_rows_is_a_split_of_background_images(files, capsys):
    """Header only: no box, no class (the CSV's classes are its labels), so the
    detection's class is unknown and dropped, as pycocotools drops a detection of a
    category the split does not list."""
    truth = files.write("truth.csv", "image_id,label,x_min,y_min,x_max,y_max\n")
    images = files.write("images.csv", "image_id,width,height\n1,100,100\n")
    dt = files.write("dt.csv", "image_id,label,x_min,y_min,x_max,y_max,score\n1,a,1,1,5,5,0.5\n")
    args = ("score", "--truth", truth, "--images", images, "--predictions", dt, "--format", "json")
    assert main([str(a) for a in args]) == 0
    counts = json.loads(capsys.readouterr().out)["counts"]
    assert (counts["images"], counts["truth_boxes"], counts["dropped_predictions"]) == (1, 0, 1)


def _nested(levels):
    return "[" * levels + "]" * levels


DEEP = sys.getrecursionlimit() + 200  # Python's json module stops there too


@pytest.mark.parametrize("nan", [False, True])
@pytest.mark.parametrize("which", ["truth", "predictions"])
def test_nesting_deeper_than_a_reader_follows_is_a_syntax_error(files, capsys, which, nan):
    """An extra key of an image or a detection holding nested arrays deeper than the
    recursion limit: "not valid JSON" at the bracket that goes one level too deep (a
    NaN elsewhere takes the literal-tolerant path, which must say the same)."""
    extra = f'"x": {_nested(DEEP)}'
    width = "NaN" if nan else "100"
    gt = f'{{"images": [{{"id": 1, "width": {width}, "height": 100, {extra}}}], '
    gt += '"categories": [{"id": 1, "name": "a"}], "annotations": []}'
    dt = f'[{{"image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5, {extra}}}]'
    if which == "truth":
        dt = json.dumps(DET)
    else:
        gt = gt.replace(extra, '"x": []')
    paths = {"truth": files.write("gt.json", gt), "predictions": files.write("dt.json", dt)}
    code, err = _cli(
        capsys, "score", "--truth", paths["truth"], "--predictions", paths["predictions"]
    )
    assert code == 2
    text = gt if which == "truth" else dt
    at = text.index("[" * DEEP)  # the bracket at depth limit + 1, counted from the top:
    depth = sum(text[:at].count(c) * (1 if c in "[{" else -1) for c in "[{]}")
    column = at + sys.getrecursionlimit() - depth + 1
    # the split's reader checks each array of records on its own, one level down: the
    # bracket it names is the next one
    columns = (column, column + 1) if which == "truth" else (column,)
    assert err in [
        f"error: {paths[which]}: not valid JSON: nested deeper than {sys.getrecursionlimit()} "
        "levels, more than a JSON reader follows (Python's recursion limit, "
        f"{sys.getrecursionlimit()}, bounds its json module too) at line 1, column {c}\n"
        for c in columns
    ]


def test_nesting_a_reader_follows_is_read(files, capsys):
    """500 levels: Python's json reads it (common practice: its default limit is 1000
    frames), so it is scored; the extra key is never read."""
    dt = [{**DET[0], "x": json.loads(_nested(500))}]
    args = ("score", "--truth", _split(files, []), "--predictions", files.write("dt.json", dt))
    assert _cli(capsys, *args) == (0, "")


# Options naming files ------------------------------------------------------------------


@pytest.fixture
def scored(files):
    """A small split and detections, and the arguments that score them."""
    truth = _split(files, [_box(1, [10, 10, 20, 20]), _box(2, [50, 50, 30, 30])])
    dt = files.write("dt.json", DET + [{**DET[0], "bbox": [52, 48, 30, 30], "score": 0.4}])
    return ["score", "--truth", str(truth), "--predictions", str(dt)]


@pytest.mark.parametrize(
    "content, message",
    [
        (b"[" * DEEP + b"]" * DEEP, "not valid JSON: nested deeper than"),
        ('{"name": "caf\xe9"}'.encode("latin-1"), "not valid JSON: not UTF-8 text (byte 13"),
        ('{"name": "p"}'.encode("utf-16"), "the file is UTF-16 text"),
        (
            b'{"name": "p", "iou_thresholds": [0.5,]}',
            "not valid JSON: Expecting value at line 1, column 38",
        ),
        (b'{"name": "p", "base": {"name": "q"}}', "field 'base': must be a preset"),
        (b'{"name": "p", "base": "kitti"}', "field 'base': must be a preset"),
        (b'{"name": "coco", "base": "coco"}', "field 'name': 'coco' is a preset's name"),
        (b'{"name": "miss-rate"}', "field 'name': 'miss-rate' is a preset's name"),
    ],
    ids=[
        "deep",
        "latin-1",
        "utf-16",
        "syntax",
        "base-object",
        "base-unknown",
        "preset-name",
        "level-preset-name",
    ],
)
def test_a_custom_protocol_file_that_cannot_be_read(files, capsys, scored, content, message):
    path = files.root / "p.json"
    path.write_bytes(content)
    code, err = _cli(capsys, *scored, "--protocol", path)
    assert code == 2
    assert err.startswith(f"error: {path}: ") and message in err and err.count("\n") == 1


def test_a_custom_protocol_file_with_a_utf8_byte_order_mark_is_read(files, capsys, scored):
    path = files.root / "p.json"
    path.write_bytes(b'\xef\xbb\xbf{"name": "strict", "iou_thresholds": [0.8]}')
    assert main([*scored, "--protocol", str(path), "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out)["protocol"] == "strict"


@pytest.mark.parametrize("option", ["--records", "--records-out"])
@pytest.mark.parametrize("where", ["no-folder", "a-folder"])
def test_an_output_path_that_cannot_be_written(files, capsys, scored, option, where):
    """Checked before scoring: one line naming the path, nothing on stdout."""
    name = "r.npz" if option == "--records" else "r.csv"
    path = files.root / "missing" / name
    if where == "a-folder":
        path = files.root / name
        path.mkdir()
    assert main([*scored, option, str(path)]) == 2
    out, err = capsys.readouterr()
    assert out == ""
    assert err.startswith(f"error: {path}: ") and option in err and err.count("\n") == 1


def test_a_write_that_fails_leaves_no_file_behind(files, capsys, scored, monkeypatch):
    """The disk fills up while the export is written: neither output appears (the
    records were complete already), no part of one is left, no result is printed."""

    def full(path, *args, **kwargs):
        with open(path, "w") as f:
            f.write("row,image_id\n")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(export, "write", full)
    records, rows = files.root / "r.npz", files.root / "r.csv"
    before = sorted(p.name for p in files.root.iterdir())
    assert main([*scored, "--records", str(records), "--records-out", str(rows)]) == 2
    out, err = capsys.readouterr()
    assert out == ""
    assert err == f"error: {rows}: cannot be written (--records-out): No space left on device\n"
    assert sorted(p.name for p in files.root.iterdir()) == before


@pytest.mark.parametrize("where", ["a-file", "under-a-file"])
def test_a_cache_option_that_is_no_folder(files, capsys, scored, where):
    path = files.root / "gt.json"
    path.write_text("{}")
    if where == "under-a-file":
        path = path / "cache"
    code, err = _cli(capsys, *scored, "--cache", path)
    assert code == 2
    assert err.startswith(f"error: {path}: ") and "--cache" in err and err.count("\n") == 1


def test_a_cache_entry_that_cannot_be_written_costs_time_not_the_result(
    files, capsys, scored, caplog
):
    cache = files.root / "cache"
    assert main([*scored, "--cache", str(cache), "--format", "json"]) == 0
    expected = json.loads(capsys.readouterr().out)
    entries = sorted(cache.iterdir())
    assert len(entries) == 2  # the split and the detections
    for entry in entries:  # an entry's name taken by a folder: unreadable, unwritable
        entry.unlink()
        entry.mkdir()
    assert main([*scored, "--cache", str(cache), "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out)["summary"] == expected["summary"]
    assert "could not be written (Is a directory); not cached" in caplog.text
    assert sorted(cache.iterdir()) == entries  # no temporary file left


# explain -------------------------------------------------------------------------------


def test_explain_a_file_nested_too_deep(files, capsys):
    deep = files.write("deep.json", '{"protocol_record": ' + _nested(DEEP) + "}")
    ok = files.write("ok.json", {"protocol_record": {}})
    code, err = _cli(capsys, "explain", ok, deep)
    assert code == 2
    assert err.startswith(f"error: {deep}: not a JSON result: nested deeper than")


def test_explain_shows_a_lone_surrogate_as_its_escape(files):
    """``"\\ud800"`` is valid JSON (RFC 8259 allows any escaped code unit; Python's json
    reads it) but no UTF-8 text: a real process prints it escaped."""
    a = files.write("a.json", '{"protocol_record": {"\\ud800": 1}}')
    b = files.write("b.json", '{"protocol_record": {"\\ud800": 2}}')
    proc = subprocess.run(
        [sys.executable, "-m", "evaluation.engine", "explain", str(a), str(b)],
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONIOENCODING": "utf-8"},
    )
    assert (proc.returncode, proc.stderr) == (0, "")
    assert "1 setting(s) differ" in proc.stdout and "* \\ud800\n" in proc.stdout


def test_explain_a_file_holding_nan_does_not_differ_from_itself(files, capsys):
    """json reads NaN as nan, and nan != nan (IEEE 754): compared as the same value."""
    a = files.write("a.json", '{"protocol_record": {"x": NaN, "y": [1, {"z": NaN}]}}')
    assert main(["explain", str(a), str(a)]) == 0
    assert capsys.readouterr().out.startswith("The two results were computed under the same")
    b = files.write("b.json", '{"protocol_record": {"x": NaN, "y": [1, {"z": 0.5}]}}')
    assert main(["explain", str(a), str(b)]) == 0
    assert "1 setting(s) differ" in capsys.readouterr().out


# the last resort -----------------------------------------------------------------------


def test_an_internal_error_is_one_line_asking_for_a_report(monkeypatch, capsys):
    from evaluation.engine import __main__ as cli

    def broken():
        raise RuntimeError("boom")

    monkeypatch.setattr(cli, "main", broken)
    monkeypatch.delenv(cli.TRACEBACK_ENV, raising=False)
    assert cli._run() == 1
    err = capsys.readouterr().err
    assert err.startswith("internal error (RuntimeError: boom): please report it")
    assert "Traceback" not in err and err.count("\n") == 1
    monkeypatch.setenv(cli.TRACEBACK_ENV, "1")
    with pytest.raises(RuntimeError, match="boom"):
        cli._run()


def test_a_custom_protocol_naming_a_class_the_split_lacks_names_its_file(files, capsys, scored):
    path = files.write("p.json", {"name": "p", "class_iou_thresholds": {"truck": 0.7}})
    code, err = _cli(capsys, *scored, "--protocol", path)
    assert code == 2
    assert err == (
        f"error: {path}: field 'class_iou_thresholds': 'truck' is not a class of the split "
        "(classes: a)\n"
    )


def test_outputs_write_through_a_link_and_into_a_pipe(files, capsys, scored):
    """A symbolic link stays a link (its target gets the file); a pipe is written in
    place, never replaced by a regular file (as ``/dev/stdout`` must not be)."""
    target = files.root / "kept.npz"
    link = files.root / "link.npz"
    link.symlink_to(target)
    pipe = files.root / "pipe.csv"
    os.mkfifo(pipe)
    received = []
    reader = threading.Thread(target=lambda: received.append(pipe.read_text()), daemon=True)
    reader.start()
    assert main([*scored, "--records", str(link), "--records-out", str(pipe)]) == 0
    reader.join(timeout=30)  # still blocked: the pipe was never opened for writing
    assert received, "nothing was written into the pipe"
    capsys.readouterr()
    assert link.is_symlink() and target.stat().st_size > 0
    assert stat.S_ISFIFO(pipe.stat().st_mode)
    assert received[0].startswith(",".join(export.COLUMNS) + "\n")
