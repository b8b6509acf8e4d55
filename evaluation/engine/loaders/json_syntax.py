"""A JSON syntax check of a file of any size in bounded memory.

Every ground-truth JSON file is read here, and only here: a whole-file decode would
map or read the file in (its pages then count in the resident set), so a malformed
file would cost memory in proportion to its size before its error. With a sink
(``coco_truth._Records``), each checked slice of a record array is handed on for typed
decoding into columns. Here the file is read ``CHUNK_BYTES`` at a time. Per chunk,
vectorised over the sparse positions of quotes and brackets only, a quote counts
unless an odd run of backslashes precedes it, brackets and commas inside strings are
dropped, and each remaining one gets its nesting depth. Every container opened at
depth 2 — the records of ``images``, ``annotations``, ... — is checked by msgspec in
slices cut at its own top-level commas (the comma replaced by the container's opening
bracket, as in the detections loader); the bytes at depth 0 and 1 (the outer object, its keys, the
brackets of its arrays) form a small skeleton, checked as it stands whenever a slice
fails (so the earlier error wins) and at the end. The message is msgspec's, at the
same line and column as a whole-file parse gives (``tests/engine/test_json_syntax.py``
compares them on thousands of damaged files), or the truncation if there is none.
About ten times slower than msgspec's own scan (~1 s per 100 MB on a shared core).
"""

import bisect
import re

import msgspec
import numpy as np

from ..errors import InputError
from . import json_bytes, json_literals

CHUNK_BYTES = 4 << 20
#: No record of a ground-truth array is this long: past it, checking stops.
MAX_PIECE_BYTES = 64 << 20
#: The skeleton (everything outside the arrays of records) never holds this much.
MAX_SKELETON_BYTES = 16 << 20

_OPEN = {ord("{"): ord("}"), ord("["): ord("]")}


def _structure(chunk, in_string, backslashes):
    """The brackets and commas of ``chunk`` that lie outside strings.

    Returns their positions and bytes, and the state carried to the next chunk
    (inside a string; length of the trailing run of backslashes). Only sparse arrays
    are built: the positions of quotes, backslashes and structural characters.
    A quote is a string delimiter unless an odd run of backslashes precedes it.
    """
    a = np.frombuffer(chunk, np.uint8)
    n = len(a)
    is_quote = a == 0x22
    mask = is_quote | (a == 0x7B) | (a == 0x7D) | (a == 0x5B) | (a == 0x5D) | (a == 0x2C)
    places = np.flatnonzero(mask)  # quotes and structural bytes, in order
    kinds = a[places]
    real = kinds == 0x22
    slashes = np.flatnonzero(a == 0x5C)
    if len(slashes) or backslashes:
        quotes = places[real]
        # Runs of consecutive backslashes: their ends and lengths (the first run may
        # continue the previous chunk's trailing run).
        if len(slashes):
            breaks = np.flatnonzero(np.diff(slashes) != 1)
            run_end = np.r_[slashes[breaks], slashes[-1:]]
            run_start = np.r_[slashes[:1], slashes[breaks + 1]]
            run_len = run_end - run_start + 1
            if run_start[0] == 0:
                run_len[0] += backslashes
            k = np.minimum(np.searchsorted(run_end, quotes - 1), len(run_end) - 1)
            before = np.where(run_end[k] == quotes - 1, run_len[k], 0)
        else:
            run_len, before = slashes, np.zeros(len(quotes), np.int64)
        before = np.where(quotes == 0, backslashes, before)
        escaped = quotes[before % 2 == 1]
        real[np.searchsorted(places, escaped)] = False
        if len(slashes) and slashes[-1] == n - 1:
            backslashes = int(run_len[-1])
        elif n:
            backslashes = 0
    parity = (np.cumsum(real) + in_string) % 2  # 1: inside a string (after a quote)
    outside = ~real & (kinds != 0x22) & (parity == 0)
    if n:
        in_string = bool(parity[-1]) if len(parity) else in_string
    return places[outside], kinds[outside], in_string, int(backslashes)


def _last_key(tail):
    """The string key that ``tail`` (valid JSON up to a value) ends with, or None."""
    tail = tail.rstrip()
    if not tail.endswith(b":"):
        return None
    tail = tail[:-1].rstrip()
    if not tail.endswith(b'"'):
        return None
    j = len(tail) - 1
    while True:  # back to the opening quote: the first one not escaped
        j = tail.rfind(b'"', 0, j)
        if j < 0:
            return None
        slashes = j - len(tail[:j].rstrip(b"\\"))
        if slashes % 2 == 0:
            break
    try:
        return msgspec.json.decode(tail[j:], type=str)
    except msgspec.DecodeError:
        return None


class _Checker:
    def __init__(self, path, f, skip, sink=None):
        self.path, self.f, self.skip, self.sink = path, f, skip, sink
        self.skeleton = bytearray()
        self.runs = []  # (position in skeleton, absolute file offset) of each run
        self.run_offsets = []  # the absolute file offsets of ``runs``, for bisect
        self.key = None  # the key of the depth-2 container being read (with a sink)
        self.key_index = 0  # skeleton position of that container's opening bracket
        self.piece = None  # bytearray from a depth-2 opener (or cut comma) onwards
        self.piece_at = 0  # absolute offset of piece[0]
        self.closer = 0
        self.was_cut = False  # piece[0] replaces the comma of a cut
        self.commas = 0  # top-level commas of the depth-2 container being read
        self.totals = {}  # key -> records of its array (the last one of that key)

    def fail(self, error, offset):
        text = str(error)
        if "truncated" in text:
            return InputError(self.path, "the JSON ends early: the file looks truncated")
        reason = text.split(":", 1)[-1].split("(byte")[0].strip()
        line, column = self.line_column(offset)
        return InputError(self.path, f"not valid JSON: {reason} at line {line}, column {column}")

    def line_column(self, offset):
        """1-based line and column of an absolute offset, reading up to it in chunks."""
        return json_bytes.line_column_in(self.f, self.skip, offset, CHUNK_BYTES)

    def _byte_of(self, error):
        m = re.search(r"\(byte ([0-9]+)\)", str(error))
        return int(m.group(1)) if m else None

    def check_piece(self, end, closing):
        """Check ``piece[:end]`` closed by the container's real closing bracket
        (``closing``), or, at a cut (``piece[end]`` is a comma), ``piece[:end + 1]``
        followed by a stand-in member and the bracket: then "[," and ",," are still
        caught, and an error can only lie in the file's own bytes."""
        if closing:
            view = bytes(self.piece[:end]) + bytes([self.closer])
            records = view
        else:
            filler = b"0" if self.closer == 0x5D else b'"":0'
            view = bytes(self.piece[: end + 1]) + filler + bytes([self.closer])
            records = bytes(self.piece[:end]) + bytes([self.closer])
        decoded = False  # by the sink, as typed records: then the syntax holds too
        if self.sink is not None and self.key is not None and self.closer == 0x5D:
            k = self.key_index
            decoded = self.sink(
                self.key,
                records,
                first=not self.was_cut,
                piece_at=self.piece_at,
                prefix=lambda: bytes(self.skeleton[:k]),
            )
        try:
            if not decoded:
                json_literals.check_syntax(view)
        except msgspec.DecodeError as e:
            k = self._byte_of(e)
            if not closing and (k is None or k > end):
                return
            raise self.first(e, self.piece_at + (k or 0)) from None
        if closing and self.was_cut and not self.piece[1:end].strip():
            # "[" here stands for the comma of a cut: ", ]" is a trailing comma
            kind = "array" if self.closer == 0x5D else "object"
            raise self.first(
                msgspec.DecodeError(f"JSON is malformed: trailing comma in {kind} (byte 0)"),
                self.piece_at + end,
            )

    def open_key(self, offset):
        """Remember the key whose value is the depth-2 container opened at ``offset``
        (None unless it is a plain string key): the skeleton holds it just before."""
        i = bisect.bisect_right(self.run_offsets, offset) - 1
        self.key_index = k = self.runs[i][0] + offset - self.runs[i][1]
        self.key = _last_key(bytes(self.skeleton[max(0, k - 4096) : k]))

    def first(self, error, offset):
        """The error at ``offset``, unless the skeleton read so far fails earlier."""
        try:
            json_literals.check_syntax(bytes(self.skeleton))
        except msgspec.DecodeError as e:
            k = self._byte_of(e)
            if k is not None and self.file_offset(k) < offset:
                return self.fail(e, self.file_offset(k))
        return self.fail(error, offset)

    def file_offset(self, k):
        """Absolute offset of skeleton byte ``k``."""
        if not self.runs:
            return k
        starts = [r[0] for r in self.runs]
        i = max(int(np.searchsorted(starts, k, "right")) - 1, 0)
        return self.runs[i][1] + k - self.runs[i][0]

    def add_skeleton(self, data, offset):
        if not data:
            return
        self.runs.append((len(self.skeleton), offset))
        self.run_offsets.append(offset)
        self.skeleton += data
        if len(self.skeleton) > MAX_SKELETON_BYTES:
            raise InputError(
                self.path,
                f"more than {MAX_SKELETON_BYTES >> 20} MB outside the arrays of records: "
                "not a ground-truth file",
            )

    def check_skeleton(self):
        try:
            json_literals.check_syntax(bytes(self.skeleton))
        except msgspec.DecodeError as e:
            k = self._byte_of(e)
            raise self.fail(e, 0 if k is None else self.file_offset(k)) from None


def check(path, f, skip, sink=None):
    """Raise the first syntax error of the JSON file ``f`` (from byte ``skip`` on), or
    the truncation; return the checker if the file is syntactically valid JSON.

    With a ``sink``, each slice of an array that is the value of a key of the outer
    object is passed on once its syntax is checked, in file order:
    ``sink(key, records, first=, piece_at=, prefix=)`` gets the key, the slice as a
    JSON array of whole records, whether it opens the array, the slice's absolute
    offset (its byte 0) and a function returning the skeleton up to the array (the
    outer object so far, inner containers empty); it returns True if it decoded the
    slice (whose syntax then needs no second look)."""
    c = _Checker(path, f, skip, sink)
    in_string, backslashes, depth = False, 0, 0
    offset = skip
    f.seek(skip)
    text = json_bytes.Checker(path, skip)  # UTF-8 and integer digits, as Python's json
    while True:
        chunk = f.read(CHUNK_BYTES)
        if not chunk:
            text.finish()
            break
        text.feed(chunk)
        marks, kinds, in_string, backslashes = _structure(chunk, in_string, backslashes)
        opens = (kinds == 0x7B) | (kinds == 0x5B)
        closes = (kinds == 0x7D) | (kinds == 0x5D)
        after = depth + np.cumsum(opens.astype(np.int64) - closes)
        before = after - opens + closes
        negative = np.flatnonzero(after < 0)
        stop = int(negative[0]) + 1 if len(negative) else len(marks)  # an extra closer
        marks, kinds, opens, closes = marks[:stop], kinds[:stop], opens[:stop], closes[:stop]
        after, before = after[:stop], before[:stop]
        end_byte = int(marks[-1]) + 1 if len(negative) else len(chunk)
        # The skeleton: bytes at depth <= 1. After a mark at depth <= 1, the bytes up to
        # the next mark; a mark opening a depth-2 container, itself alone.
        nxt = np.r_[marks[1:], end_byte]
        lo = marks
        hi = np.where(after <= 1, nxt, np.where(before <= 1, marks + 1, marks))
        if depth <= 1:
            lo, hi = np.r_[0, lo], np.r_[marks[0] if len(marks) else end_byte, hi]
        keep = hi > lo
        lo, hi = lo[keep], hi[keep]
        joined = np.flatnonzero(lo[1:] != hi[:-1])  # merge touching ranges
        lo, hi = np.r_[lo[:1], lo[joined + 1]], np.r_[hi[joined], hi[-1:]]
        for x, y in zip(lo.tolist(), hi.tolist()):
            c.add_skeleton(chunk[x:y], offset + x)
        # Depth-2 containers: opened where ``after`` becomes 2 from 1, closed back to 1.
        events = np.flatnonzero((opens & (after == 2)) | (closes & (after == 1)))
        # Records of each depth-2 array: its top-level commas + 1 (if not empty).
        commas_before = np.cumsum((kinds == 0x2C) & (after == 2)) - ((kinds == 0x2C) & (after == 2))
        pos, counted = 0, 0
        for e in events.tolist():
            i = int(marks[e])
            c.commas += int(commas_before[e]) - counted
            counted = int(commas_before[e])
            if opens[e]:
                c.piece, c.piece_at, c.was_cut = bytearray(chunk[i : i + 1]), offset + i, False
                c.closer = _OPEN[int(kinds[e])]
                c.commas = 0
                c.open_key(offset + i)
            else:
                if c.piece is not None:
                    c.piece += chunk[pos:i]
                    c.closer = int(kinds[e])
                    c.check_piece(len(c.piece), closing=True)
                    if c.closer == 0x5D and c.key is not None:
                        empty = not c.commas and not c.was_cut and not c.piece[1:].strip()
                        c.totals[c.key] = 0 if empty else c.commas + 1
                c.piece = None
            pos = i + 1
        if len(kinds):
            c.commas += int(np.sum((kinds == 0x2C) & (after == 2))) - counted
        if len(negative):  # the extra closer: msgspec names it in the skeleton
            c.check_skeleton()
            raise InputError(path, "not valid JSON: unbalanced brackets")
        if c.piece is not None:
            start = len(c.piece)
            c.piece += chunk[pos:]
            if len(c.piece) > CHUNK_BYTES:
                commas = marks[(kinds == 0x2C) & (after == 2) & (marks >= pos)]
                if not len(commas) and len(c.piece) > MAX_PIECE_BYTES:
                    line, column = c.line_column(c.piece_at)
                    raise InputError(
                        path,
                        f"no record ends within {MAX_PIECE_BYTES >> 20} MB of the array "
                        f"opened at line {line}, column {column}: a record longer than "
                        f"{MAX_PIECE_BYTES >> 20} MB is not read (this reader's limit; "
                        "pycocotools reads the file whole), or this is no ground-truth file",
                    )
                if len(commas):
                    cut = start + int(commas[-1]) - pos
                    c.check_piece(cut, closing=False)
                    opener = c.piece[0]
                    del c.piece[:cut]
                    c.piece[0] = opener  # the comma becomes the opening bracket
                    c.piece_at += cut
                    c.was_cut = True
        if len(after):
            depth = int(after[-1])
        offset += len(chunk)
    if c.piece is not None:  # a container still open: check what it holds so far
        try:
            json_literals.check_syntax(bytes(c.piece))
        except msgspec.DecodeError as e:
            if "truncated" not in str(e):
                k = c._byte_of(e)
                raise c.first(e, c.piece_at + (k or 0)) from None
    c.check_skeleton()
    if in_string or depth:
        raise InputError(path, "the JSON ends early: the file looks truncated")
    return c


def first_record_end(buf):
    """The offset of the comma (or closing bracket) that ends the first element of
    the JSON array ``buf`` (which starts with ``[``), found at nesting depth 1 outside
    strings, so a ``},`` closing a nested object inside the record is never taken for
    its end; None while the bytes hold no such end yet."""
    marks, kinds, _, _ = _structure(bytes(buf), False, 0)
    opens = (kinds == 0x7B) | (kinds == 0x5B)
    closes = (kinds == 0x7D) | (kinds == 0x5D)
    after = np.cumsum(opens.astype(np.int64) - closes)
    ends = np.flatnonzero(((kinds == 0x2C) & (after == 1)) | (after == 0))
    return int(marks[ends[0]]) if len(ends) else None


class RecordEnd:
    """``first_record_end`` of a buffer that only grows, in linear time: each call
    scans only the bytes added since the last one, ``SCAN_BYTES`` at a time, carrying
    ``_structure``'s state (inside a string, trailing backslashes) and the nesting
    depth over; so the arrays it builds stay a few times ``SCAN_BYTES`` (a comma every
    few bytes costs ~10 bytes of arrays per byte), not the whole buffer's. ``ends``
    counts the records ended so far (commas at depth 1)."""

    SCAN_BYTES = 1 << 20

    def __init__(self):
        self.scanned, self.in_string, self.backslashes, self.depth = 0, False, 0, 0
        self.end, self.ends = None, 0

    def find(self, buf):
        """``first_record_end(buf)``; ``buf[:scanned]`` must be what earlier calls saw."""
        while len(buf) > self.scanned and self.depth >= 0:
            at = self.scanned
            marks, kinds, self.in_string, self.backslashes = _structure(
                bytes(buf[at : at + self.SCAN_BYTES]), self.in_string, self.backslashes
            )
            opens = (kinds == 0x7B) | (kinds == 0x5B)
            closes = (kinds == 0x7D) | (kinds == 0x5D)
            after = self.depth + np.cumsum(opens.astype(np.int64) - closes)
            commas = (kinds == 0x2C) & (after == 1)
            ends = np.flatnonzero(commas | (after == 0))
            if self.end is None and len(ends):
                self.end = at + int(marks[ends[0]])
            self.ends += int(np.count_nonzero(commas))
            if len(after):
                self.depth = int(after[-1]) if after.min() > 0 else -1  # the array closed
            self.scanned = min(len(buf), at + self.SCAN_BYTES)
        return self.end
