"""COCO-style JSON files: detections read whole (``read_detections``) or a slice at a
time (``detection_blocks``), on ``results_stream``; and, importable from here too, the
ground truth (``read_truth``: ``coco_truth``) and the record helpers of
``coco_records``.
"""

import numpy as np

from .checks import text_start
from .coco_records import Id, category_name, int_column, validation_error, whole_ids
from .coco_truth import read_truth
from .results_stream import _stream

__all__ = [
    "Id",
    "category_name",
    "detection_blocks",
    "empty_columns",
    "int_column",
    "read_detections",
    "read_truth",
    "validation_error",
    "whole_ids",
]

#: A detections file larger than this gets a validation pass that keeps no columns
#: before the one that builds them, so a type error late in it is rejected at flat
#: memory; below it, the columns built up to such an error stay under ~0.7x this size.
VALIDATE_FIRST_BYTES = 128 << 20


def _ends_like_an_array(f):
    size = f.seek(0, 2)
    f.seek(max(size - 4096, 0))
    return f.read().rstrip().endswith(b"]")


def read_detections(path, wide=False):
    """Decode a COCO-style results file: image ids, category ids, xywh boxes, scores
    (ids beyond signed 64 bits: see ``int_column``)."""
    with open(path, "rb") as f:
        skip = text_start(path, f.read(4))
        if f.seek(0, 2) - skip > VALIDATE_FIRST_BYTES or not _ends_like_an_array(f):
            # Large, malformed or truncated: find the first error without keeping any
            # columns, so rejecting a huge broken file needs no memory in proportion
            # to it; the records counted let the columns be allocated once.
            f.seek(skip)
            total = sum(_stream(path, f, skip, build=False))
            f.seek(skip)
            return _filled(_stream(path, f, skip, wide=wide), total)
        f.seek(skip)
        parts = list(_stream(path, f, skip, wide=wide))
    if not parts:
        return empty_columns()
    return tuple(_joined(column, parts) for column in zip(*parts))


#: The column of unfit records (``results_stream._block``): a box-reading block holds
#: it only when some record is unfit (``box_results``), None elsewhere.
_UNFIT = 6


def _joined(column, parts):
    """One column of the blocks joined (the reading: the first block's; the unfit
    column None if no block has one, else None for each record of the others)."""
    if any(c is not None and not isinstance(c, str) for c in column):
        return np.concatenate(
            [np.full(len(p[3]), None, object) if c is None else c for c, p in zip(column, parts)]
        )
    return column[0]


def detection_blocks(path, wide=False, decode=None):
    """The columns of ``read_detections`` a slice of the file at a time (a few MB),
    in file order: memory follows the slice, not the file."""
    with open(path, "rb") as f:
        skip = text_start(path, f.read(4))
        f.seek(skip)
        yield from _stream(path, f, skip, wide=wide, decode=decode)


def empty_columns():
    """The columns of a file without records."""
    empty = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros((0, 4)), np.zeros(0))
    return (*empty, None, None, None, None)


def _filled(parts, total):
    """The columns of ``parts`` written into arrays of their known full length (no
    second copy while joining); an id column turns to objects for ids beyond int64."""
    columns, at = None, 0
    for part in parts:
        if columns is None:
            columns = [
                p if p is None or isinstance(p, str) else np.empty((total, *p.shape[1:]), p.dtype)
                for p in part
            ]
            if columns[_UNFIT] is not None:
                columns[_UNFIT][:] = None
        n = len(part[0])
        if columns[_UNFIT] is None and part[_UNFIT] is not None:  # the first unfit record
            columns[_UNFIT] = np.full(total, None, object)
        for i, values in enumerate(part):
            if values is None or isinstance(values, str):
                continue
            if values.dtype != columns[i].dtype:
                columns[i] = columns[i].astype(object)
            columns[i][at : at + n] = values
        at += n
    if columns is None:
        return empty_columns()
    return tuple(c if c is None or isinstance(c, str) else c[:at] for c in columns)
