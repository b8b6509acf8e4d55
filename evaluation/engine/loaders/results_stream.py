"""The results array of a COCO-style detections file read in bounded memory: slices of
a few megabytes are cut after a record's ``}`` (``_last_cut``), decoded in place
(``_decode_slice``, by the reading of the file's first record: ``_first_mode``) and
turned into columns at once (``_block``, ``_columns``), so a file of millions of
detections never exists as Python objects (or as one byte string) all together, and a
malformed or truncated one is rejected at flat memory (``_check_prefix``,
``slice_errors.cut_short``). A record longer than the slice limit is refused at about
the buffer's own size, in linear time: each new chunk is scanned once for where the
first record ends (``json_syntax.RecordEnd``, kept in ``_Scan``), and the prefix is
checked at doubling lengths, in place, without building its values.

``CHUNK_BYTES`` and ``MAX_SLICE_BYTES``, like ``_decode_slice`` and ``_columns``, are
looked up here at call time (tests patch them on this module).
"""

import re
from itertools import chain
from operator import attrgetter

import msgspec
import numpy as np

from ..errors import InputError
from . import (
    json_bytes,
    json_literals,
    json_syntax,
    mask_results,
    result_readings,
    slice_errors,
    unread_fields,
)
from .coco_records import _INT_ONLY, _Detection, int_column, validation_error, whole_ids

CHUNK_BYTES = 4 << 20
#: No detection record is this long: past it, reading stops with an error instead of
#: buffering a malformed file.
MAX_SLICE_BYTES = 64 << 20


def _columns(records, path="", base=0, wide=False):
    n = len(records)

    def locate(i):
        return f"record {base + i}"

    def ids(values, field):
        values = whole_ids(path, values, locate, field)
        if set(map(type, values)) <= _INT_ONLY:
            try:
                return np.fromiter(values, np.int64, n)
            except OverflowError:  # beyond int64: see int_column
                pass
        return int_column(path, values, locate, field, wide)

    # Fields read with C-level getters (no Python frame per record); each bbox is a
    # 4-tuple of floats (the struct's type), laid out row after row.
    return (
        ids(list(map(_IMAGE_ID, records)), "image_id"),
        ids(list(map(_CATEGORY_ID, records)), "category_id"),
        np.fromiter(chain.from_iterable(map(_BBOX, records)), np.float64, 4 * n).reshape(-1, 4),
        np.fromiter(map(_SCORE, records), np.float64, n),
    )


_IMAGE_ID, _CATEGORY_ID = attrgetter("image_id"), attrgetter("category_id")
_BBOX, _SCORE = attrgetter("bbox"), attrgetter("score")


class _Checked:
    """The file, each chunk read through ``json_bytes.Checker`` (UTF-8, integer digits:
    what Python's json refuses before any record is read)."""

    def __init__(self, path, f, skip):
        self.f, self.checker = f, json_bytes.Checker(path, skip)

    def read(self, n):
        chunk = self.f.read(n)
        if chunk:
            self.checker.feed(chunk)
        else:
            self.checker.finish()
        return chunk


def _last_cut(buf, lowest):
    """(end of a record's ``}``, position after the comma that follows it), the last
    such pair at or after ``lowest``; None if there is none yet."""
    brace = len(buf)
    while True:
        brace = buf.rfind(b"}", lowest, brace)
        if brace < 0:
            return None
        after = brace + 1
        while after < len(buf) and buf[after : after + 1].isspace():
            after += 1
        if buf[after : after + 1] == b",":
            return brace + 1, after + 1


def _decode_slice(piece, path="", base=0, mode=mask_results.BOXES):
    """Typed detections of a slice; one whose typed decode fails on a ``bbox`` or
    ``score`` is decoded again loosely (``unread_fields.normalise_detections``).
    Under ``mask_results.MASKS`` (the file's first result has a segmentation and no
    box) the records of ``mask_results.decode``; under the other readings of
    ``result_readings`` those of its ``decode``."""
    if mode == mask_results.MASKS:
        return mask_results.decode(piece, path, base)
    if mode in result_readings.MODES:
        return result_readings.decode(piece, path, base, mode)
    try:
        return json_literals.decode(piece, list[_Detection])
    except msgspec.ValidationError as e:
        if not unread_fields.loose_detection(str(e)):
            raise
        loose = json_literals.decode(piece, list[unread_fields.LooseDetection])
        return unread_fields.normalise_detections(path, loose, base)


def _stream(path, f, skip, build=True, wide=False, decode=None):
    """Columns of the records of a top-level JSON array, read a few MB at a time
    (with ``build=False`` only the record counts: a validation pass; ``decode``: how a
    slice becomes records: ``_decode_slice`` unless given, as ``exact_scores``' loose one).

    Memory stays bounded by the slice size whatever the file size, also when the
    file turns out to be malformed or truncated: nothing is ever read whole. A slice
    ends after a ``}`` followed by a comma; should that ``}`` sit inside a string or
    a nested object, the slice fails right at its end, and it is simply extended.
    """
    decode = decode or _decode_slice
    f = _Checked(path, f, skip)
    where = slice_errors.Position(skip)
    buf = f.read(CHUNK_BYTES)
    while buf and not buf.strip():  # leading whitespace
        where.advance(buf)
        buf = f.read(CHUNK_BYTES)
    if not buf:
        raise InputError(path, "the file is empty")
    lead = len(buf) - len(buf.lstrip())
    first = buf[lead : lead + 1]
    if first == b"{":
        raise InputError(
            path,
            "expected a JSON array of detections, got an object (is this a ground-truth file?)",
        )
    if first != b"[":
        try:
            json_literals.check_syntax(buf[lead:])
        except msgspec.DecodeError as e:
            where.advance(buf[:lead])
            raise slice_errors.piece_error(path, e, buf[lead:], where, 0) from None
        raise InputError(path, "expected a JSON array of detections")
    # buf[0] is always "[": the array's own bracket, later the comma before the next
    # record, overwritten. A slice is decoded in place: the byte after its last "}" is
    # set to "]" for the call and restored, so no slice is ever copied.
    where.advance(buf[:lead])
    buf = bytearray(buf[lead:])
    base, lowest, eof, mode = 0, 1, False, None
    scan = _Scan()  # of buf since its last cut
    while True:
        if mode is None:
            mode = _first_mode(path, buf, where, eof, scan)
            if mode is None:  # the first record is not whole yet: take more
                more = f.read(CHUNK_BYTES)
                eof = not more
                buf += more
                continue
        if eof:
            end = len(buf)  # the rest, closing bracket included
        else:
            cut = _last_cut(buf, lowest)
            if cut is None:
                if len(buf) > CHUNK_BYTES:  # no record ends here: a real error is reported
                    _check_prefix(path, buf, where, base, mode, scan)
                more = f.read(CHUNK_BYTES)
                eof = not more
                buf += more
                continue
            end = cut[0] + 1
            saved, buf[cut[0]] = buf[cut[0]], 0x5D  # "]"
        view = memoryview(buf)[:end]
        try:
            records = decode(view, path, base, mode)
        except msgspec.ValidationError as e:
            raise validation_error(path, e, top_level_list=True, base=base) from None
        except msgspec.DecodeError as e:
            m = re.search(r"\(byte ([0-9]+)\)", str(e))
            at_end = "truncated" in str(e) or (m and int(m.group(1)) >= end - 1)
            if not eof and at_end:  # maybe a cut inside a string: take more
                view.release()
                buf[cut[0]] = saved
                lowest = len(buf)
                scan.record_end.find(buf)  # the records ended so far, for the limit
                if len(buf) > MAX_SLICE_BYTES:
                    raise _too_long(path, base + scan.record_end.ends) from None
                more = f.read(CHUNK_BYTES)
                eof = not more
                buf += more
                continue
            view.release()
            if not eof:
                buf[cut[0]] = saved
            raise slice_errors.piece_error(path, e, buf, where, 0) from None
        finally:
            view.release()
        if not len(records) and base:  # "[" stands for a cut's comma: "}, ]"
            raise slice_errors.trailing_comma(path, buf, where)
        yield _block(records, path, base, wide, mode, build)
        if eof:
            return
        base += len(records)
        comma = cut[1] - 1
        where.advance(buf, comma)
        del buf[:comma]
        buf[0] = 0x5B  # "["
        lowest, scan = 1, _Scan()
        more = f.read(CHUNK_BYTES)
        eof = not more
        buf += more


class _Scan:
    """What is known of the buffer since its last cut: where its first record ends
    (``json_syntax.RecordEnd``, scanning each new chunk once) and the length at which
    its prefix was last checked (checks at doubling lengths: linear time in all)."""

    def __init__(self):
        self.record_end, self.checked = json_syntax.RecordEnd(), 0

    def due(self, buf):
        """Whether to check the prefix now: its length has doubled since the last
        check, or it is past ``MAX_SLICE_BYTES`` (its last check before giving up)."""
        if len(buf) < 2 * self.checked and len(buf) <= MAX_SLICE_BYTES:
            return False
        self.checked = len(buf)
        return True


def _first_mode(path, buf, where, eof, scan):
    """The reading (``mask_results.mode``) of the file's first record, decided only
    once that record is whole in ``buf`` (its end found at nesting depth 1, so however
    the bytes were chunked); None while it is not and more can be read. A first
    record that does not decode is read as boxes, whose decoding reports its error."""
    end = scan.record_end.find(buf)
    if end is None and not eof:
        if len(buf) > CHUNK_BYTES and scan.due(buf):  # a syntax error inside it is reported
            error = slice_errors.syntax_error(buf)
            if error is not None:
                raise slice_errors.piece_error(path, error, buf, where, 0) from None
            if len(buf) > MAX_SLICE_BYTES:
                raise _too_long(path, 0)
        return None
    first = bytes(buf) if end is None else bytes(buf[:end]) + b"]"
    return mask_results.mode(first) or mask_results.BOXES


def _block(records, path, base, wide, mode, build):
    """A slice's columns (image ids, class ids, boxes, scores, areas: None when the
    file is read as boxes, the reading: ``mask_results.mode``, the unfit fields:
    ``_unfit``, and the records' own ids under ``result_readings.GIVEN``, else None),
    or with ``build=False`` its record count (a mask-reading slice is still checked
    whole)."""
    if mode in result_readings.MODES:
        if not build:
            return len(records)
        area = result_readings.area(records)
        ids = None
        if mode == result_readings.GIVEN:
            ids = np.empty(len(records), object)
            ids[:] = records.ids if len(records) else ids
        return (*_columns(records, path, base, wide), area, mode, _unfit(records), ids)
    if mode != mask_results.MASKS:
        if not build:
            return len(records)
        unfit = _unfit(records) if any(getattr(records, "unfit", None) or ()) else None
        return (*_columns(records, path, base, wide), None, None, unfit, None)
    boxes, area = mask_results.columns(records, path, base)
    if not build:
        return len(records)
    for record, box in zip(records, boxes.tolist()):
        record.bbox = box
    return (*_columns(records, path, base, wide), area, mode, _unfit(records), None)


def _unfit(records):
    """Per record None, or the ``(field, message)`` pycocotools would fail on only if
    it compared the record (``result_readings.Decoded``): an object array."""
    column = np.full(len(records), None, object)
    unfit = getattr(records, "unfit", None)
    for i, why in enumerate(unfit or ()):
        if why is not None:  # a tuple: set one element, not a broadcast
            column[i] = why
    return column


def _check_prefix(path, buf, where, base, mode, scan):
    """Raise the decoding error of buf (which starts with "[") unless it only ends
    early; give up past ``MAX_SLICE_BYTES`` without a record boundary. Checked at
    doubling lengths (``_Scan.due``). While no first record ends in it (one record
    longer than the buffer: ``scan.record_end``), only its syntax is checked, and under
    the box reading the strict typed decode's first mismatch (not a ``bbox`` or
    ``score`` one, whose loose decoding would build every value as an object, nor a
    number out of float64's range, read as Python's json reads it), so the memory
    stays about the buffer's own, whatever it holds."""
    end = scan.record_end.find(buf)  # every chunk, each scanned once
    if not scan.due(buf):
        return
    boxes = mode == mask_results.BOXES
    try:
        if end is not None:  # a whole record that is no object
            error = None
            try:
                _decode_slice(bytes(buf), path, base, mode)
            except msgspec.ValidationError:
                raise
            except msgspec.DecodeError as e:
                error = None if slice_errors.cut_short(e, buf) else e
        else:
            try:
                error = slice_errors.syntax_error(buf, list[_Detection] if boxes else msgspec.Raw)
            except msgspec.ValidationError as e:
                loose = unread_fields.loose_detection(str(e))
                if not (boxes and (loose or str(e).startswith("Number out of range"))):
                    raise
                error = slice_errors.syntax_error(buf)
    except msgspec.ValidationError as e:
        raise validation_error(path, e, top_level_list=True, base=base) from None
    if error is not None:
        raise slice_errors.piece_error(path, error, buf, where, 0) from None
    if len(buf) > MAX_SLICE_BYTES:
        raise _too_long(path, base + scan.record_end.ends)


def _too_long(path, record):
    return InputError(
        path,
        f"no record ends within {MAX_SLICE_BYTES >> 20} MB: a record longer than "
        f"{MAX_SLICE_BYTES >> 20} MB is not read (this reader's limit; pycocotools reads "
        "the file whole), or this is no detections file",
        record=f"record {record}",
    )
