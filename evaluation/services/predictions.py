"""Receiving predictions: spool an upload (hashed), check it against its split as the
worker will read it (whole, or streamed into per-shard pieces), store its bytes once;
and the engine load of a stored predictions file under its uploaded name.
"""

import contextlib
import os
import tempfile

from django.conf import settings
from django.db import IntegrityError, transaction

from .. import engine, pieces
from ..models import PredictionFile
from ..storage import ContentMismatch, TooLarge, save_from_path, spool
from .policy import ENGINE_IDS, UploadError, _format_of, _limit, input_policy
from .stored import _cache_dir, load_truth_of


class Received:
    """An upload spooled to a temporary folder: ``path``, ``sha256``, ``size`` and
    ``name`` (its base name as sent). ``store()`` puts it into the storage, with the
    per-shard pieces its validation streamed (``pieces``), if any."""

    def __init__(self, path, sha256, size):
        self.path, self.sha256, self.size = path, sha256, size
        self.name = os.path.basename(path)
        self._stored = None
        self.pieces = None  # (streamed pieces, split, policies) of a streamed check
        self._kept = pieces.Kept()

    def store(self):
        """The ``PredictionFile`` of these bytes (the existing row, or a new one with
        its file stored) and its pieces. Call it inside the caller's transaction."""
        prediction_file = self._file()
        if self.pieces is not None:
            streamed, split, policies = self.pieces
            pieces.keep(
                streamed,
                prediction_file,
                split,
                unknown_images="reject",
                kept=self._kept,
                **policies,
            )
        return prediction_file

    def _file(self):
        existing = PredictionFile.objects.filter(sha256=self.sha256).first()
        if existing is not None:
            return existing
        prediction_file = PredictionFile(
            sha256=self.sha256, size=self.size, original_name=self.name
        )
        save_from_path(prediction_file.file, self.path, self.name)
        try:
            with transaction.atomic():
                prediction_file.save()
        except IntegrityError:  # the same bytes arrived concurrently
            prediction_file.file.storage.delete(prediction_file.file.name)
            return PredictionFile.objects.get(sha256=self.sha256)
        self._stored = prediction_file.file
        return prediction_file

    def discard(self):
        """Delete the files ``store()`` wrote (their rows went with the rolled-back
        transaction)."""
        self._kept.discard()
        if self._stored is not None:
            self._stored.storage.delete(self._stored.name)
            self._stored = None


@contextlib.contextmanager
def received_predictions(uploaded, split, *, boxes="keep", unknown_classes=None):
    """Receive a predictions upload for ``split``: spool it (hashed, block by block),
    refuse an empty file or one over ``BENCHBOOK_MAX_UPLOAD_BYTES`` (``UploadError``),
    and check it against the split as the worker will read it, under the box policy
    ``boxes`` and the class policy ``unknown_classes`` (``input_policy``; detections of
    unlisted classes dropped by default) (``engine.InputError`` naming file, record and
    field): a file of at most
    ``BENCHBOOK_INLINE_VALIDATION_BYTES`` is loaded with the engine; a larger JSON or
    CSV file for a split of several shards is streamed into per-shard pieces
    (``pieces``), stored with it by ``store()``. Other files are checked by the worker.

    Yields a ``Received``; if the block raises, the files it stored are deleted again,
    so a refused upload leaves nothing behind.
    """
    unknown_classes = input_policy(unknown_classes=unknown_classes)["unknown_classes"]
    with tempfile.TemporaryDirectory() as work:
        received = _spooled(uploaded, work)
        path, size = received.path, received.size
        fmt = None if engine.is_collection(path) else _format_of(received.name)
        try:
            if size <= settings.BENCHBOOK_INLINE_VALIDATION_BYTES:
                _load_predictions(
                    path,
                    load_truth_of(split, boxes),
                    received.name,
                    boxes,
                    unknown_classes=unknown_classes,
                )
            elif pieces.worth_streaming(split, size, fmt):
                piece_dir = os.path.join(work, "pieces")
                os.mkdir(piece_dir)
                streamed = pieces.stream(
                    path,
                    load_truth_of(split, boxes),
                    received.name,
                    piece_dir,
                    fmt=fmt,
                    boxes=boxes,
                    unknown_images="reject",
                    unknown_classes=unknown_classes,
                    ids=ENGINE_IDS,
                )
                received.pieces = (
                    streamed,
                    split,
                    {"box_policy": boxes, "unknown_classes": unknown_classes},
                )
        except engine.InputError as e:
            e.argument = "predictions"  # the request field, for API error bodies
            raise
        except ContentMismatch as e:  # the split's stored truth changed (audited)
            raise UploadError(f"{split} cannot be used: {e}") from None
        try:
            yield received
        except BaseException:
            received.discard()
            raise


def store_predictions(uploaded):
    """Store a predictions file's bytes (same bytes, same row) without checking them
    against a split: for tools and tests that request evaluations directly. Uploads
    go through ``received_predictions``."""
    with tempfile.TemporaryDirectory() as work:
        return _spooled(uploaded, work).store()


def _spooled(uploaded, work):
    """The upload spooled into the folder ``work`` (hashed, block by block) as a
    ``Received``; ``UploadError`` for a file over ``BENCHBOOK_MAX_UPLOAD_BYTES`` or an
    empty one."""
    try:
        path, sha, size = spool(uploaded, _limit(), work)
    except TooLarge as e:
        raise UploadError(str(e)) from None
    received = Received(path, sha, size)
    if size == 0:
        raise UploadError(f"{received.name}: the file is empty")
    return received


def _load_predictions(
    path, truth, name, boxes="keep", *, unknown_images="reject", unknown_classes=None
):
    """The engine's predictions of the file at ``path``, uploaded as ``name`` (the
    format follows the name) under the box policy ``boxes`` and the class policy
    ``unknown_classes`` (``input_policy``); errors name the file as uploaded.
    ``unknown_images="drop"`` only for a re-scored file (``Evaluation``)."""
    unknown_classes = input_policy(unknown_classes=unknown_classes)["unknown_classes"]
    with _under_name(path, name) as path:
        return _load_named(path, truth, name, boxes, unknown_images, unknown_classes)


@contextlib.contextmanager
def _under_name(path, name):
    """``path`` seen under the name it was uploaded as, when that name carries
    meaning: a lone VOC result file's class is in its name
    (``comp4_det_test_car.txt``), and the stored file may carry another name (the
    same bytes uploaded first under another name, or an object store's temporary
    copy). A link in a temporary folder; other files are read where they are."""
    base = os.path.basename(name or "")
    if not engine.is_voc_result_name(base) or os.path.basename(path) == base:
        yield path
        return
    with tempfile.TemporaryDirectory() as folder:
        named = os.path.join(folder, base)
        os.symlink(os.path.abspath(path), named)
        yield named


def _load_named(path, truth, name, boxes, unknown_images, unknown_classes):
    try:
        return engine.load_predictions(
            path,
            truth,
            fmt=_format_of(name, path),
            boxes=boxes,
            unknown_images=unknown_images,
            unknown_classes=unknown_classes,
            cache_dir=_cache_dir(),
            ids=ENGINE_IDS,
        )
    except engine.InputError as e:
        same_file = os.path.basename(e.path) == os.path.basename(path)
        e.path = name if same_file else os.path.basename(e.path)
        raise
