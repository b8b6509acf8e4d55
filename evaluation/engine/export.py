"""Match records as rows: CSV or JSON Lines, streamed a block of rows at a time.

One row per detection (accumulation order: class, score descending), then one per
ground-truth box (split order). Memory beyond the records is one block of rows, whatever
the number of detections. Columns (``COLUMNS``):

``row``            ``detection`` or ``box``
``image_id``       the split's image id (JSON Lines: the JSON value the split gave; an
                   infinite one as the string "Infinity" or "-Infinity"; a text id
                   holding a lone UTF-16 surrogate, which no UTF-8 text can hold, as the
                   JSON-quoted text CSV and the pages show, ``"a\\ud800"``, and so
                   is a text id beginning with ``"`` in such a split: see ``_jsonl_id``)
``class``          the row's class
``score``          detection score (empty for a box)
``x, y, w, h``     the row's box, pixels, as the engine holds it: for a file given
                   as corners (VOC XML, VOC result files, CSV, KITTI) ``x1, y1,
                   x2 - x1, y2 - y1`` (w rounded to float64), so ``x + w`` may miss
                   the ``x2`` read by an ulp; voc, voc07 and kitti2d measured the
                   ``iou`` on the corners as read (``GroundTruth.corners``)
``outcome``        ``tp`` / ``fp`` / ``ignored`` (detection), ``matched`` / ``missed`` /
                   ``ignored`` (box)
``reason``         ``reasons.DETECTION_REASONS`` or ``reasons.BOX_REASONS``
``iou_threshold``  the primary IoU threshold of the row's class
``detection``      0-based position in the predictions file of the detection's record
                   (``MatchRecords.file_positions``): the detection's own, or for a box
                   the matching / pointing / nearest detection's (empty if none). A
                   JSON file's records count from its top-level array's first element,
                   a CSV file's from its first data row (header and blank lines not
                   counted); a KITTI, YOLO or VOC-results folder's in the order the
                   loader reads them: files in name order, lines in file order. Records
                   the loaders leave out (classes or images outside the split, fields
                   pycocotools never reads) keep their numbers: the next kept record
                   is not renumbered (before engine 2.24.0 this was the position among
                   the kept records: ``RECORD_POSITIONS_SINCE``). A JSON file read "as
                   given" with repeated ids names the record whose values the row
                   carries (``loaders/as_given.py``), so two rows may name one record.
``box_id``         the box's annotation id: a box's own, or for a detection the box its
                   reason is about (empty if none)
``related_class``  class of that related box or detection
``iou``            IoU with it
``protocol``       the protocol the records were scored under (``MatchRecords.protocol``)
``engine_version`` the engine that wrote the rows (``ENGINE_VERSION`` unless given)
``box_policy``     the box policy the boxes were read under (``keep``, ``clip``,
                   ``reject``: ``clip`` changes boxes, so IoU and outcomes)
``truth_fingerprint`` the split's content hash (``GroundTruth.content_hash``), as the
                   result records it
``protocol_sha256`` the digest of the protocol's every setting (``Protocol.digest``),
                   as the result records it: two custom protocols named alike differ
                   here (empty where the writer was not given it)

The last five repeat on every row, so each row (and any part of the file) says how it
was scored, and CSV and JSON Lines readers need no header comment; added in engine
2.18.0 (``box_policy`` and ``truth_fingerprint`` in 2.18.1, ``protocol_sha256`` in
2.19.0), after the others, so readers by column name are unchanged.
"""

import csv
import io
import json
import math

import numpy as np

from .loaders.ids import SURROGATE, key_value, keys_of, quoted
from .protocols import PRESETS
from .reasons import BOX_REASONS, DETECTION_REASONS, box_outcome, detection_outcome
from .version import ENGINE_VERSION

COLUMNS = (
    "row",
    "image_id",
    "class",
    "score",
    "x",
    "y",
    "w",
    "h",
    "outcome",
    "reason",
    "iou_threshold",
    "detection",
    "box_id",
    "related_class",
    "iou",
    "protocol",
    "engine_version",
    "box_policy",
    "truth_fingerprint",
    "protocol_sha256",
)
BLOCK_ROWS = 20_000
#: The first engine whose records keep each detection's record position
#: (``MatchRecords.det_record``) where the loaders left records out.
RECORD_POSITIONS_SINCE = "2.24.0"
CONTENT_TYPES = {"csv": "text/csv; charset=utf-8", "jsonl": "application/x-ndjson"}


def _check(records, truth):
    records.require_reasons()
    if records.n_images != truth.n_images or len(records.gt_class) != truth.n_boxes:
        raise ValueError(
            f"these records index {records.n_images} images and {len(records.gt_class)} "
            f"boxes; the split given has {truth.n_images} and {truth.n_boxes}"
        )


def _optional(values, present):
    """Python list with None where ``present`` is False."""
    return [v if p else None for v, p in zip(values.tolist(), present.tolist())]


def row_blocks(
    records,
    truth,
    block_rows=BLOCK_ROWS,
    typed_ids=False,
    engine_version=ENGINE_VERSION,
    protocol_sha256=None,
):
    """Yield blocks of rows, each a dict column -> list of Python values (None = empty);
    with ``typed_ids`` image ids are the JSON values the split gave (2.5, not "2.5");
    ``protocol_sha256``: the scoring protocol's ``digest()`` (default: the preset's of
    that name; empty for another name the writer was not given the digest of)."""
    fingerprint = truth.content_hash()
    if protocol_sha256 is None and records.protocol in PRESETS:
        protocol_sha256 = PRESETS[records.protocol].digest()
    for block in _row_blocks(records, truth, block_rows, typed_ids):
        rows = len(block["row"])
        block["protocol"] = [records.protocol] * rows
        block["engine_version"] = [engine_version] * rows
        block["box_policy"] = [truth.box_policy] * rows
        block["truth_fingerprint"] = [fingerprint] * rows
        block["protocol_sha256"] = [protocol_sha256] * rows
        yield block


def _row_blocks(records, truth, block_rows, typed_ids):
    _check(records, truth)
    classes = np.array(records.classes, dtype=object)
    threshold = records.thresholds[0]
    image_ids = np.asarray(truth.image_ids, dtype=object)
    if typed_ids and truth.image_id_type:
        keys = keys_of(truth.image_ids, truth.image_id_type)
        image_ids = np.array([key_value(k) for k in keys.tolist()], dtype=object)
    n, m = records.n_detections, truth.n_boxes  # none: nothing to relate a row to
    positions = records.file_positions()
    for start in range(0, n, block_rows):
        s = slice(start, min(n, start + block_rows))
        cls, box = records.det_class[s], records.det_box[s]
        ref, iou = records.det_ref_box[s].astype(np.int64), records.det_ref_iou[s]
        has = ref >= 0
        safe = np.where(has, ref, 0)
        yield {
            "row": ["detection"] * len(cls),
            "image_id": image_ids[records.det_image[s]].tolist(),
            "class": classes[cls].tolist(),
            "score": records.det_score[s].tolist(),
            "x": box[:, 0].tolist(),
            "y": box[:, 1].tolist(),
            "w": box[:, 2].tolist(),
            "h": box[:, 3].tolist(),
            "outcome": detection_outcome(records.det_reason[s]).tolist(),
            "reason": np.array(DETECTION_REASONS)[records.det_reason[s]].tolist(),
            "iou_threshold": threshold[cls].tolist(),
            "detection": positions[s].tolist(),
            "box_id": _optional(truth.box_ids[safe] if m else safe, has),
            "related_class": _optional(classes[truth.box_class[safe]] if m else safe, has),
            "iou": _optional(iou, has),
        }
    # a repeated id's annotations this reading does not read (``GroundTruth.repeated``)
    unread = truth.repeated_left_out(records.tie_order == "image")
    for start in range(0, m, block_rows):
        s = np.arange(start, min(m, start + block_rows))
        s = s[~unread[s]]
        cls, box = truth.box_class[s], truth.boxes[s]
        ref, iou = records.gt_ref_det[s].astype(np.int64), records.gt_ref_iou[s]
        has = ref >= 0
        safe = np.where(has, ref, 0)
        yield {
            "row": ["box"] * len(cls),
            "image_id": image_ids[truth.box_image[s]].tolist(),
            "class": classes[cls].tolist(),
            "score": [None] * len(cls),
            "x": box[:, 0].tolist(),
            "y": box[:, 1].tolist(),
            "w": box[:, 2].tolist(),
            "h": box[:, 3].tolist(),
            "outcome": box_outcome(records.gt_reason[s]).tolist(),
            "reason": np.array(BOX_REASONS)[records.gt_reason[s]].tolist(),
            "iou_threshold": threshold[cls].tolist(),
            "detection": _optional(positions[safe] if n else safe, has),
            "box_id": truth.box_ids[s].tolist(),
            "related_class": _optional(classes[records.det_class[safe]] if n else safe, has),
            "iou": _optional(iou, has),
        }


def csv_chunks(
    records, truth, block_rows=BLOCK_ROWS, engine_version=ENGINE_VERSION, protocol_sha256=None
):
    """Yield the CSV text (header first) a block of rows at a time. Floats are written
    with Python's shortest round-trip repr; an empty field is a missing value."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(COLUMNS)
    yield buffer.getvalue()
    for block in row_blocks(
        records, truth, block_rows, engine_version=engine_version, protocol_sha256=protocol_sha256
    ):
        buffer.seek(0)
        buffer.truncate()
        writer.writerows(zip(*(block[c] for c in COLUMNS)))
        yield buffer.getvalue()


#: Non-finite numbers (scored as given from NaN/Infinity inputs) in JSON Lines: strict
#: JSON has no such numbers, so they are written as these strings (Python's literals).
NON_FINITE_TEXT = {"nan": "NaN", "inf": "Infinity", "-inf": "-Infinity"}


def _strict(value):
    if isinstance(value, float) and not math.isfinite(value):
        return NON_FINITE_TEXT[repr(value)]
    return value


def _jsonl_id(value, id_type):
    """An image id as JSON Lines writes it. Strict JSON readers refuse a lone surrogate
    escape (RFC 8259 section 8.2 leaves its handling open; msgspec, for one, refuses
    it), so in a ``"json"`` id family an id holding one is written as its JSON-quoted
    text (``ids.quoted``, injective), and so is an id beginning with ``"``, so that
    no two ids are written alike: a written id beginning with ``"`` is always quoted
    (``json.loads`` of it gives the id back)."""
    if id_type == "json" and isinstance(value, str):
        if value.startswith('"') or SURROGATE.search(value):
            return quoted(value)
    return _strict(value)


def jsonl_chunks(
    records, truth, block_rows=BLOCK_ROWS, engine_version=ENGINE_VERSION, protocol_sha256=None
):
    """Yield JSON Lines text, one object per row (missing values are null; a NaN or
    infinite score, coordinate, IoU or image id is the string "NaN", "Infinity",
    "-Infinity"; image ids as ``_jsonl_id`` writes them). Every line is strict JSON
    and UTF-8 text."""
    encode = json.JSONEncoder(allow_nan=False, separators=(",", ":")).encode
    for block in row_blocks(records, truth, block_rows, True, engine_version, protocol_sha256):
        block["image_id"] = [_jsonl_id(v, truth.image_id_type) for v in block["image_id"]]
        for name in ("score", "x", "y", "w", "h", "iou"):
            block[name] = [_strict(v) for v in block[name]]
        yield "".join(
            encode(dict(zip(COLUMNS, values))) + "\n"
            for values in zip(*(block[c] for c in COLUMNS))
        )


FORMATS = {"csv": csv_chunks, "jsonl": jsonl_chunks}


def format_of(path):
    """``csv`` or ``jsonl`` from a file name; ValueError for anything else."""
    name = str(path).lower()
    for suffix, fmt in ((".csv", "csv"), (".jsonl", "jsonl"), (".ndjson", "jsonl")):
        if name.endswith(suffix):
            return fmt
    raise ValueError(f"{path}: the records export is .csv or .jsonl")


def write(path, records, truth, fmt=None, protocol_sha256=None):
    """Write the export to ``path`` (format from its extension unless ``fmt``)."""
    chunks = FORMATS[fmt or format_of(path)]
    with open(path, "w", encoding="utf-8", newline="") as f:
        for chunk in chunks(records, truth, protocol_sha256=protocol_sha256):
            f.write(chunk)
