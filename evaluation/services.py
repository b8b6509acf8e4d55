"""Business logic of the evaluation app: load splits, store predictions, score.

Views, commands and tasks call these functions and nothing else writes these models.
"""

import contextlib
import hashlib
import logging
import os
import tempfile

from django.conf import settings
from django.core.files import File
from django.db import IntegrityError, transaction
from django.utils import timezone

from . import engine, jobs, levels, pieces, signals, split_identity
from .models import BenchmarkSplit, Evaluation, PredictionFile
from .protocols import resolve as resolve_protocol
from .storage import (
    ContentMismatch,
    TooLarge,
    check_sha256,
    local_path,
    save_from_path,
    spool,
    verified_bytes,
)

log = logging.getLogger(__name__)

#: The ids the platform reads (``engine.load_truth``/``load_predictions(ids=)``): any
#: id pycocotools 2.0.11 accepts, as it orders and matches them. Every entry point
#: reaches the engine through the loads here; pages, URLs and downloads never hold an
#: id as a number (images are routed by their index in the split, ids shown as the
#: engine's text), so no stricter reading is offered.
ENGINE_IDS = "any"
#: How a split's annotations are read (``engine.load_truth(annotations=)``): the
#: default is pycocotools' reading, counted; ``strict`` refuses such files.
ANNOTATION_POLICIES = ("reference", "strict")
#: How a new split reads an annotation's ``vis_ratio`` key (``engine.load_truth
#: (vis_ratio=)``): as the city-scale evaluation script does (``as-given``: any number
#: or boolean, winning beside a ``visibility``, for miss-rate-cityscale). A stored split
#: keeps the reading it was frozen with (``BenchmarkSplit.vis_ratio_reading``:
#: migration 0022 set ``unread`` on splits frozen before the key was read, 0023 keeps
#: ``read`` on those frozen with engines 2.9-2.10), so its content hash still matches.
VIS_RATIO_READING = "as-given"
#: How a new split's content hash is taken (``engine.GroundTruth.content_hash(scheme)``):
#: ids that are not numbers hash with their kind. A stored split is verified with the
#: scheme it was frozen with (``BenchmarkSplit.hash_scheme``; migration 0024 sets
#: ``untyped`` on splits frozen before), so its sha256 is never rewritten.
HASH_SCHEME = "typed"
#: Detections of classes the split does not list (``engine.load_predictions
#: (unknown_classes=)``): the default drops them as pycocotools does, counted and named
#: in the result; ``reject`` refuses the file.
UNKNOWN_CLASS_POLICIES = ("drop", "reject")


def input_policy(*, annotations=None, unknown_classes=None):
    """The one decision of how the platform reads what a reference implementation
    accepts: the engine options for a split load (``annotations``) or a predictions
    load (``unknown_classes``). None (not given) is the reference behaviour — the
    annotations pycocotools 2.0.11 scores (``COCOeval._prepare`` walks ``getImgIds()``
    and ``getCatIds()`` only; a repeated id resolves to its last annotation in
    ``COCO.createIndex``) and detections of unlisted classes kept out, as ``evaluate``
    never looks at them; the stricter policy is the user's pick. Every entry point
    (page, API, client, commands, worker, re-score, pieces) reaches the engine through
    this; an unknown value is an ``UploadError`` naming the setting. Returns
    ``{"annotations": ..., "unknown_classes": ...}``. Detections of
    images the split lacks stay refused on upload (``loadRes`` asserts "Results do not
    correspond to current coco set"): that is ``unknown_images``, not decided here.
    """
    policy = {
        "annotations": annotations or "reference",
        "unknown_classes": unknown_classes or "drop",
    }
    for setting, allowed in (
        ("annotations", ANNOTATION_POLICIES),
        ("unknown_classes", UNKNOWN_CLASS_POLICIES),
    ):
        if policy[setting] not in allowed:
            raise UploadError(
                f"{setting}: unknown policy {policy[setting]!r}; use {' or '.join(allowed)}",
                path=setting,
            )
    return policy


class UploadError(ValueError):
    """A request the platform refuses; the message says what and where.

    ``path`` optionally names the request field at fault (``"rules[2].threshold"``),
    for API error bodies.
    """

    def __init__(self, message, *, path=""):
        super().__init__(message)
        self.path = path


class UploadConflict(UploadError):
    """A request refused because of the present state of what it changes (HTTP 409)."""


def _limit():
    return settings.BENCHBOOK_MAX_UPLOAD_BYTES


def _cache_dir():
    """The engine's columnar cache: entries keyed with a secret derived from
    ``SECRET_KEY`` and checked on every load; a failed check rebuilds the entry from its
    (hashed) source and is written to the audit trail (``cache_rebuilt``)."""
    secret = hashlib.sha256(b"benchbook engine cache|" + settings.SECRET_KEY.encode()).digest()
    return engine.Cache(str(settings.BENCHBOOK_ENGINE_CACHE), secret, cache_rebuilt)


class CacheEntryRebuilt(Exception):
    """A cache entry failed its digest check (edited or damaged) and was rebuilt."""

    def __init__(self, path, reason):
        super().__init__(
            f"engine cache entry {os.path.basename(path)} {reason}; rebuilt from source"
        )
        self.name, self.reason = os.path.basename(path), reason

    def as_dict(self):
        return {"what": "engine cache entry", "file": self.name, "reason": self.reason}


def cache_rebuilt(path, reason):
    error = CacheEntryRebuilt(path, reason)
    log.error("%s", error)
    subject = f"cache:{os.path.basename(path).removesuffix('.npz')}"
    signals.content_mismatch.send(CacheEntryRebuilt, subject=subject, error=error)


def _format_of(name, path=None):
    """The engine format of an upload: a zip (by content) is a KITTI, YOLO or VOC
    label archive, detected by the engine; otherwise the name says CSV or JSON."""
    if path is not None and engine.is_collection(path):
        return engine.detect_format(path)
    return "csv" if name.lower().endswith(".csv") else "json"


# Splits ---------------------------------------------------------------------------


def load_split(
    *, name, revision, truth, images=None, description="", created_by="", annotations=None
):
    """Validate, hash and freeze a benchmark split from uploaded or opened files.

    ``truth``: COCO-style JSON, a boxes CSV (then ``images`` is the images table), or
    a zip of KITTI, YOLO or VOC XML label files (``images`` optional).
    ``annotations`` (``input_policy``): ``reference`` (default) reads a COCO-style file
    as pycocotools does — annotations of unlisted images or categories left out, a
    repeated annotation id resolved to its last annotation — and records what it left
    out (``annotations_left_out``, shown with the split); ``strict`` refuses such files.
    Raises ``engine.InputError`` for bad content and ``UploadError`` for a refused
    request; in both cases nothing is stored.
    """
    policy = input_policy(annotations=annotations)["annotations"]
    if BenchmarkSplit.objects.filter(name=name, revision=revision).exists():
        raise UploadError(
            f"{name} rev {revision} already exists and is frozen; "
            "load a corrected split as a new revision"
        )
    with tempfile.TemporaryDirectory() as work:
        try:
            truth_path, _, _ = spool(truth, _limit(), work)
            images_path = None
            if images is not None:
                images_dir = os.path.join(work, "images")
                os.mkdir(images_dir)
                images_path, _, _ = spool(images, _limit(), images_dir)
        except TooLarge as e:
            raise UploadError(str(e)) from None
        try:
            source_format = _format_of(truth_path, truth_path)
            loaded = engine.load_truth(
                truth_path,
                images=images_path,
                fmt=source_format,
                ids=ENGINE_IDS,
                annotations=policy,
                vis_ratio=VIS_RATIO_READING,
            )
        except engine.InputError as e:
            e.argument = "images" if images_path and str(e.path) == images_path else "truth"
            e.path = os.path.basename(e.path)  # the name as uploaded, not the spool folder
            raise
        except OverflowError:  # a number a fixed-size column cannot hold
            names = [os.path.basename(p) for p in (truth_path, images_path) if p]
            raise UploadError(
                f"{' or '.join(names)}: a number is too large to be read", path="truth"
            ) from None
        sha = loaded.content_hash(HASH_SCHEME)
        refusal = split_identity.twin_refusal(
            loaded, sha, HASH_SCHEME, lambda split: _read_truth(split, "keep")
        )
        if refusal:
            raise UploadError(refusal)
        tags = {tag: int(loaded.tag_mask(tag).sum()) for tag in loaded.tags()}
        counted = ~(loaded.crowd | loaded.ignore | loaded.difficult)
        split = BenchmarkSplit(
            name=name,
            revision=revision,
            description=description,
            classes=list(loaded.classes),
            class_counts={
                c: int(((loaded.box_class == k) & counted).sum())
                for k, c in enumerate(loaded.classes)
            },
            tags=tags,
            image_count=loaded.n_images,
            box_count=loaded.n_boxes,
            sha256=sha,
            source_format=source_format,
            road_counts=levels.split_counts(loaded),
            annotation_policy=policy,
            vis_ratio_reading=VIS_RATIO_READING,
            hash_scheme=HASH_SCHEME,
            annotations_left_out={
                key: int(loaded.box_counts.get(key, 0))
                for key in engine.ANNOTATION_COUNTS
                if loaded.box_counts.get(key, 0)
            },
            created_by=created_by,
            frozen_at=timezone.now(),
        )
        stored = []
        try:
            with transaction.atomic():
                with open(truth_path, "rb") as f:
                    split.truth_file.save(os.path.basename(truth_path), File(f), save=False)
                stored.append(split.truth_file)
                if images_path:
                    with open(images_path, "rb") as f:
                        split.images_file.save(os.path.basename(images_path), File(f), save=False)
                    stored.append(split.images_file)
                split.save()
                transaction.on_commit(
                    lambda: signals.split_frozen.send(BenchmarkSplit, split=split)
                )
        except Exception:
            for field_file in stored:  # nothing half-stored
                field_file.storage.delete(field_file.name)
            raise
    return split


def load_truth_of(split, boxes="keep"):
    """The split's ground truth as engine columns (from the columnar cache), loaded
    under the box policy ``boxes`` (``engine.BOX_POLICIES``) and checked against the
    split's recorded content hash: ContentMismatch if the stored files, or a cache
    entry, no longer hold the frozen content."""
    truth = _read_truth(split, boxes)
    actual = split_identity.split_hash(split, truth)
    if actual != split.sha256 and boxes != "keep":  # the hash was taken as frozen ("keep")
        actual = split_identity.split_hash(split, _read_truth(split, "keep"))
    check_sha256(
        f"split:{split.pk}",
        "split content",
        f"{split} ({os.path.basename(split.truth_file.name)})",
        split.sha256,
        actual,
    )
    return truth


def road_counts_of(split):
    """``levels.split_counts`` of a stored split (its files as frozen), for splits
    frozen before the counts were stored (migration 0016); None when its files are gone
    or no longer hold the frozen content (the split page then shows no counts)."""
    try:
        truth = _read_truth(split, "keep")
    except (OSError, ValueError, engine.InputError):
        return None
    if split_identity.split_hash(split, truth) != split.sha256:
        return None
    return levels.split_counts(truth)


def _read_truth(split, boxes):
    """The stored split read under the annotation policy and ``vis_ratio`` reading it
    was frozen with. A historical model of a migration before those fields existed
    (0016 counts older splits) lacks them: such splits were read strictly, without
    ``vis_ratio`` (the defaults migrations 0021 and 0022 give their rows)."""
    policy = getattr(split, "annotation_policy", "strict")
    annotations = input_policy(annotations=policy)["annotations"]
    reading = {
        "annotations": annotations,
        "vis_ratio": getattr(split, "vis_ratio_reading", "unread"),
    }
    with local_path(split.truth_file) as truth_path:
        if split.images_file:
            with local_path(split.images_file) as images_path:
                return engine.load_truth(
                    truth_path,
                    images=images_path,
                    cache_dir=_cache_dir(),
                    boxes=boxes,
                    ids=ENGINE_IDS,
                    **reading,
                )
        return engine.load_truth(
            truth_path,
            cache_dir=_cache_dir(),
            boxes=boxes,
            ids=ENGINE_IDS,
            **reading,
        )


def load_records(scorecard):
    """A scorecard's match records, their file checked against its recorded SHA-256:
    the file is read once, the bytes hashed and then parsed in place (the arrays are
    views into the checked bytes; no second read between the check and the use)."""
    buffer = verified_bytes(
        scorecard.records, scorecard.records_sha256, f"scorecard:{scorecard.pk}", "records file"
    )
    return engine.MatchRecords.from_buffer(buffer)


# Predictions ----------------------------------------------------------------------


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
        try:
            path, sha, size = spool(uploaded, _limit(), work)
        except TooLarge as e:
            raise UploadError(str(e)) from None
        received = Received(path, sha, size)
        if size == 0:
            raise UploadError(f"{received.name}: the file is empty")
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
        try:
            path, sha, size = spool(uploaded, _limit(), work)
        except TooLarge as e:
            raise UploadError(str(e)) from None
        received = Received(path, sha, size)
        if size == 0:
            raise UploadError(f"{received.name}: the file is empty")
        return received.store()


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


def request_evaluations(
    split,
    prediction_file,
    protocols,
    *,
    box_policy="keep",
    scope="",
    file_name="",
    unknown_images="reject",
    unknown_classes=None,
):
    """One evaluation per protocol (existing ones of the same ``scope`` are reused),
    dispatched on commit.

    ``unknown_images``: ``reject`` for every upload; ``drop`` only when a stored file is
    re-scored on a later revision of its split (detections of removed images are
    dropped and counted) — another evaluation than the same file under ``reject``.

    ``box_policy`` (``engine.BOX_POLICIES``) and ``unknown_classes``
    (``input_policy``: drop by default, or reject) are part of what is evaluated: the
    same file under another policy is another evaluation. ``scope`` is the requester's opaque
    key: another scope never reuses these rows. ``file_name`` is the file's name as
    this requester uploaded it (kept by a new evaluation, for its messages and, for a
    lone VOC result file, its class: such a name is part of the key).
    """
    if box_policy not in engine.BOX_POLICIES:
        raise engine.InputError(
            "box_policy", f"unknown box policy {box_policy!r}; use {', '.join(engine.BOX_POLICIES)}"
        )
    if unknown_images not in Evaluation.UnknownImages.values:
        raise engine.InputError("unknown_images", f"unknown image policy {unknown_images!r}")
    unknown_classes = input_policy(unknown_classes=unknown_classes)["unknown_classes"]
    if engine.is_voc_result_name(os.path.basename(file_name)):
        # A lone VOC result file's class is in its name: the same bytes under another
        # name are other detections, so another evaluation (its scope says which name).
        named = hashlib.sha256(os.path.basename(file_name).encode()).hexdigest()[:16]
        scope = f"{scope}/voc-result:{named}"
    evaluations = []
    for protocol in protocols:
        resolve_protocol(protocol)
        evaluation, created = Evaluation.objects.get_or_create(
            split=split,
            predictions=prediction_file,
            protocol=protocol,
            box_policy=box_policy,
            scope=scope,
            unknown_images=unknown_images,
            unknown_classes=unknown_classes,
            defaults={"file_name": file_name},
        )
        if created:
            dispatch(evaluation.pk)
        evaluations.append(evaluation)
    return evaluations


def dispatch(evaluation_id):
    """Queue scoring once the current transaction commits.

    If the broker is unreachable the evaluation stays queued and ``requeue_stalled``
    sends it again later.
    """
    from .tasks import score

    def send():
        try:
            score.delay(evaluation_id)
        except Exception:  # broker down: the sweep will retry
            log.exception("could not queue evaluation %s; the sweep will retry", evaluation_id)

    transaction.on_commit(send)


def requeue_stalled():
    """The beat sweep: requeue what a dead worker or the broker lost (``jobs``), send it."""
    requeued = jobs.requeue_stalled()
    for pk in requeued:
        dispatch(pk)
    return requeued


# Scoring --------------------------------------------------------------------------


def run_evaluation(evaluation_id, claim=None):
    """Score one evaluation (``scoring.run_evaluation``, the worker's entry point)."""
    from .scoring import run_evaluation

    return run_evaluation(evaluation_id, claim)
