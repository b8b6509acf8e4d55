"""What Python's ``json`` refuses in a JSON file before any record is read, checked on the
chunks the readers read anyway (``results_stream._stream``, ``json_syntax.check``), in
bounded memory, for bytes msgspec skips without looking (strings and numbers under keys
nothing reads):

* bytes that are not UTF-8, anywhere: pycocotools 2.0.11 opens both files in text mode
  (UTF-8) and ``json.load`` reads the whole text, so a Latin-1 ``file_name`` or caption
  raises ``UnicodeDecodeError``. An incremental strict UTF-8 decoder runs over each chunk
  that is not pure ASCII (``bytes.isascii`` first: a few ms per 100 MB);
* an integer of more digits than ``sys.get_int_max_str_digits()`` (4300 by default):
  Python's ``json`` turns an integer literal into ``int`` and raises ValueError ("Exceeds
  the limit (4300 digits) for integer string conversion"), while a number with a
  fraction or an exponent (``1.<5000 digits>``, ``1<5000 digits>e0``) is a ``float``
  and fine, as are digits inside strings. A byte search for a run of more digits decides
  whether to look closer (digits mapped to one byte, ``bytes.find``); only then is the
  file read again from its start to tell strings from numbers (``json_syntax._structure``).

Each error names the file, the line and column of the first bad byte (of the number's
first digit) and, for a number that is the value of a key, that key as the field.
"""

import codecs
import re
import sys

import numpy as np

from ..errors import InputError

_READ = 4 << 20
_DIGIT_BYTES = b"0123456789"


def _leading_digits(chunk, at_least):
    """The digits ``chunk`` starts with (counted exactly up to ``at_least``; beyond,
    the whole run)."""
    head = chunk[:at_least]
    lead = len(head) - len(head.lstrip(_DIGIT_BYTES))
    if lead == len(head) < len(chunk):
        lead = len(chunk) - len(chunk.lstrip(_DIGIT_BYTES))
    return lead


def line_column_in(f, skip, offset, read_bytes=_READ):
    """1-based line and (byte) column of an absolute offset of the open binary file
    ``f`` whose text starts at ``skip``, read again in chunks up to it."""
    f.seek(skip)
    lines, line_start, at = 0, skip, skip
    while at < offset:
        block = f.read(min(read_bytes, offset - at))
        if not block:
            break
        count = block.count(b"\n")
        if count:
            lines += count
            line_start = at + block.rfind(b"\n") + 1
        at += len(block)
    return lines + 1, offset - line_start + 1


def _line_column(path, skip, offset):
    with open(path, "rb") as f:
        return line_column_in(f, skip, offset)


class Checker:
    """Fed every chunk of a file in order (``feed``), then ``finish``; raises InputError."""

    def __init__(self, path, skip):
        self.path, self.skip = path, skip
        self.offset = skip  # absolute offset of the next byte fed
        self.utf8 = codecs.getincrementaldecoder("utf-8")("strict")
        self.pending = 0  # bytes of an unfinished UTF-8 sequence held by the decoder
        self.limit = sys.get_int_max_str_digits()  # 0: no limit
        self.run = 0  # digits ending the bytes fed so far
        self.cleared = 0  # runs of digits before this offset were looked at
        self.scanned = (skip, False, 0)  # (offset, in a string, trailing backslashes)

    def feed(self, chunk):
        chunk = bytes(chunk)
        if self.pending or not chunk.isascii():
            self._decode(chunk, final=False)
        if self.limit and chunk:
            self._digits(chunk)
        self.offset += len(chunk)

    def finish(self):
        if self.pending:
            self._decode(b"", final=True)

    def _decode(self, chunk, final):
        try:
            self.utf8.decode(chunk, final)
        except UnicodeDecodeError as e:
            at = self.offset - self.pending + e.start
            line, column = _line_column(self.path, self.skip, at)
            bad = (e.object[e.start : e.start + 1] or b"\0")[0]
            raise InputError(
                self.path,
                f"not UTF-8 text: byte 0x{bad:02x} at line {line}, column {column} "
                f"({e.reason}); Python's json reads JSON as UTF-8 text",
            ) from None
        self.pending = len(self.utf8.getstate()[0])

    def _digits(self, chunk):
        """Look closer at each run of more than ``limit`` digits. A run that long holds
        three consecutive bytes of a stride of ``limit // 3``: those samples (a strided
        view) are tested first, and only where three in a row are digits are the bytes
        between them."""
        n, limit = len(chunk), self.limit
        lead = _leading_digits(chunk, limit + 1)
        if self.run + lead > limit:
            self._closer(self.offset - self.run)
        stride = max(limit // 3, 1)
        samples = (np.frombuffer(chunk, np.uint8)[::stride] - 0x30) < 10
        hits = np.flatnonzero(samples[:-2] & samples[1:-1] & samples[2:])
        for i in hits.tolist():
            p = i * stride
            if p < self.cleared - self.offset or not chunk[p : p + 2 * stride + 1].isdigit():
                continue
            lo = len(chunk[:p].rstrip(_DIGIT_BYTES))
            hi = n - len(chunk[p:].lstrip(_DIGIT_BYTES))
            carried = self.run if lo == 0 else 0
            if hi - lo + carried > limit:
                self._closer(self.offset + lo - carried)
        end = chunk[-(limit + 1) :]  # a longer run was looked at above
        tail = len(end) - len(end.rstrip(_DIGIT_BYTES))
        self.run = self.run + n if tail == n else tail

    def _closer(self, start):
        """A run of too many digits starts at absolute ``start``: refuse it if it is an
        integer outside strings, as Python's json would."""
        if start < self.cleared:  # within a run already looked at
            return
        from .json_syntax import _last_key, _structure  # json_syntax imports this module

        with open(self.path, "rb") as f:
            at, in_string, backslashes = self.scanned  # strings told apart up to ``at``
            f.seek(at)
            while at < start:
                block = f.read(min(_READ, start - at))
                if not block:
                    return
                _, _, in_string, backslashes = _structure(block, in_string, backslashes)
                at += len(block)
            self.scanned = (at, in_string, backslashes)
            if in_string:
                return
            before = max(self.skip, start - 4096)
            f.seek(before)
            head = f.read(start - before)
            f.seek(start)
            digits, after = 0, b""
            while not after:  # to the run's end, however long
                block = f.read(_READ)
                if not block:
                    break
                rest = block.lstrip(_DIGIT_BYTES)
                digits += len(block) - len(rest)
                after = rest[:1]
        self.cleared = start + digits
        sign = head[-1:] if head[-1:] in (b"-", b"+") else b""
        prior = head[: len(head) - len(sign)][-1:]
        if after in (b".", b"e", b"E") or prior in (b".", b"e", b"E") or digits <= self.limit:
            return  # a fraction or an exponent: a float in Python's json
        line, column = _line_column(self.path, self.skip, start - len(sign))
        key = _last_key(head[: len(head) - len(sign)])
        raise InputError(
            self.path,
            f"an integer of more than {self.limit} digits at line {line}, column {column}: "
            f"Python's json refuses it (its limit for integer string conversion)",
            field=key if isinstance(key, str) and _PRINTABLE.fullmatch(key) else "",
        )


_PRINTABLE = re.compile(r"[^\x00-\x1f]{1,200}")
