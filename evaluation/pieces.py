"""Per-shard pieces of a predictions file, made once while the file is validated.

A predictions file of more than ``BENCHBOOK_INLINE_VALIDATION_BYTES`` uploaded for a
split of more than ``BENCHBOOK_SHARD_IMAGES`` images is streamed at upload
(``engine.pieces.stream_pieces``: one pass, memory flat in the file's size): that pass
is its validation (a refused file leaves nothing), and its pieces — one per shard of
images, truth slice and detections as columns — are stored with the file, in the same
transaction, as a ``PredictionPieces`` set keyed by file, split, box policy, image
and class policies and shard size. A sharded evaluation of that file (``sharding.from_pieces``)
uses them, so no worker reads the file whole; a file stored before, under another
shard size or with a piece gone, is streamed the same way by the claiming worker.
"""

import dataclasses
import logging
import os

from django.conf import settings
from django.db import IntegrityError, transaction

from . import engine
from .engine import shards
from .engine.pieces import stream_pieces
from .models import PredictionPiece, PredictionPieces
from .storage import file_sha256, save_from_path

log = logging.getLogger(__name__)

#: Formats streamed a block at a time (label archives are read whole).
STREAMABLE = ("json", "csv")


def worth_streaming(split, size, fmt):
    """Whether a file of ``size`` bytes in ``fmt`` for ``split`` is cut into pieces: a
    split of more than one shard, a file too large to be loaded inline."""
    return (
        fmt in STREAMABLE
        and split.image_count > settings.BENCHBOOK_SHARD_IMAGES
        and size > settings.BENCHBOOK_INLINE_VALIDATION_BYTES
    )


def stream(path, truth, name, directory, *, fmt, boxes, unknown_images, unknown_classes, ids):
    """The pieces of the file at ``path`` (uploaded as ``name``) for ``truth`` under the
    current shard size, written into ``directory`` (``engine.pieces.StreamedPieces``).
    An ``engine.InputError`` names the file as uploaded, its record and field."""
    ranges = shards.plan(truth.n_images, settings.BENCHBOOK_SHARD_IMAGES)
    try:
        return stream_pieces(
            path,
            truth,
            ranges,
            directory,
            fmt=fmt,
            boxes=boxes,
            unknown_images=unknown_images,
            unknown_classes=unknown_classes,
            ids=ids,
        )
    except engine.InputError as e:
        e.path = name if os.path.basename(e.path) == os.path.basename(path) else e.path
        raise


def _storage():
    return PredictionPiece._meta.get_field("file").storage


def _delete_files(names):
    for name in names:
        try:
            _storage().delete(name)
        except OSError:
            log.exception("could not delete piece %s", name)


class Kept:
    """The piece files ``keep`` wrote, to delete if the caller's transaction fails."""

    def __init__(self):
        self.names = []

    def discard(self):
        _delete_files(self.names)
        self.names = []


def keep(
    streamed,
    prediction_file,
    split,
    *,
    box_policy,
    unknown_images,
    unknown_classes,
    kept=None,
):
    """Store ``streamed`` as the ``PredictionPieces`` of this file on ``split`` (or
    return the set already stored under the same key). The files, then the rows in one
    savepoint; a file of rows that did not commit is deleted, here or by the caller
    (``kept.discard``) when its own transaction rolls back."""
    key = _key(prediction_file, split, box_policy, unknown_images, unknown_classes)
    existing = PredictionPieces.objects.filter(**key).first()
    if existing is not None:
        return existing
    kept = kept if kept is not None else Kept()
    written, rows = [], []
    try:
        for k, path in enumerate(streamed.paths):
            piece = PredictionPiece(
                index=k,
                image_start=streamed.ranges[k][0],
                image_stop=streamed.ranges[k][1],
                detections=streamed.detections[k],
                sha256=file_sha256(path),
            )
            name = f"{prediction_file.sha256[:16]}-split{split.pk}-{k}.npz"
            save_from_path(piece.file, path, name)
            written.append(piece.file.name)
            rows.append(piece)
        with transaction.atomic():
            pieces = PredictionPieces.objects.create(
                **key, counts=dataclasses.asdict(streamed.counts)
            )
            for piece in rows:
                piece.pieces = pieces
            PredictionPiece.objects.bulk_create(rows)
    except IntegrityError:  # the same pieces were stored meanwhile: use those
        _delete_files(written)
        return PredictionPieces.objects.get(**key)
    except BaseException:
        _delete_files(written)
        raise
    kept.names.extend(written)
    return pieces


def stored(prediction_file, split, *, box_policy, unknown_images, unknown_classes):
    """The complete ``PredictionPieces`` of this input under the current shard size, or
    None. A set with a piece missing from the storage (or a row), or streamed before
    pieces kept their records' file positions (``PredictionCounts.record_positions``),
    is deleted, so the caller streams the file again."""
    pieces = (
        PredictionPieces.objects.filter(
            **_key(prediction_file, split, box_policy, unknown_images, unknown_classes)
        )
        .prefetch_related("pieces")
        .first()
    )
    if pieces is None:
        return None
    if not shards.PredictionCounts(**pieces.counts).record_positions:
        log.warning("%s predates file positions (engine 2.23.0); streamed again", pieces)
        delete(pieces)
        return None
    rows = sorted(pieces.pieces.all(), key=lambda p: p.index)
    plan = shards.plan(split.image_count, settings.BENCHBOOK_SHARD_IMAGES)
    whole = [(p.image_start, p.image_stop) for p in rows] == plan and all(
        p.file.storage.exists(p.file.name) for p in rows
    )
    if whole:
        return pieces
    log.warning("%s is incomplete; deleted, to be streamed again", pieces)
    delete(pieces)
    return None


def delete(pieces):
    """Delete a set of pieces: its rows, then its files."""
    rows = list(pieces.pieces.all())
    pieces.delete()
    _delete_files([row.file.name for row in rows if row.file.name])


def is_shared_piece(name):
    """Whether a stored file name is a piece of a ``PredictionPieces`` set (which
    outlives the evaluations that read it)."""
    return PredictionPiece.objects.filter(file=name).exists()


def _key(prediction_file, split, box_policy, unknown_images, unknown_classes):
    return {
        "predictions": prediction_file,
        "split": split,
        "box_policy": box_policy,
        "unknown_images": unknown_images,
        "unknown_classes": unknown_classes,
        "images_per_shard": settings.BENCHBOOK_SHARD_IMAGES,
    }
