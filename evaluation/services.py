"""Business logic of the evaluation app: load splits, store predictions, score.

Views, commands and tasks call these functions and nothing else writes these models.
"""

import contextlib
import datetime
import logging
import os
import tempfile

from django.conf import settings
from django.core.files import File
from django.db import IntegrityError, transaction
from django.utils import timezone

from . import engine, signals
from .models import BenchmarkSplit, ClassScore, Evaluation, PredictionFile, Scorecard, SliceScore
from .storage import TooLarge, local_path, spool

log = logging.getLogger(__name__)


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
    return str(settings.BENCHBOOK_ENGINE_CACHE)


def _format_of(name):
    return "csv" if name.lower().endswith(".csv") else "json"


# Splits ---------------------------------------------------------------------------


def load_split(*, name, revision, truth, images=None, description="", created_by=""):
    """Validate, hash and freeze a benchmark split from uploaded or opened files.

    ``truth``: COCO-style JSON or a boxes CSV (then ``images`` is the images table).
    Raises ``engine.InputError`` for bad content and ``UploadError`` for a refused
    request; in both cases nothing is stored.
    """
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
            loaded = engine.load_truth(truth_path, images=images_path, fmt=_format_of(truth_path))
        except engine.InputError as e:
            e.argument = "images" if images_path and str(e.path) == images_path else "truth"
            e.path = os.path.basename(e.path)  # the name as uploaded, not the spool folder
            raise
        sha = loaded.content_hash()
        twin = BenchmarkSplit.objects.filter(sha256=sha).first()
        if twin is not None:
            raise UploadError(f"the same content is already frozen as {twin}")
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
            source_format=_format_of(truth_path),
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
    under the box policy ``boxes`` (``engine.BOX_POLICIES``)."""
    with local_path(split.truth_file) as truth_path:
        if split.images_file:
            with local_path(split.images_file) as images_path:
                return engine.load_truth(
                    truth_path, images=images_path, cache_dir=_cache_dir(), boxes=boxes
                )
        return engine.load_truth(truth_path, cache_dir=_cache_dir(), boxes=boxes)


# Predictions ----------------------------------------------------------------------


class Received:
    """An upload spooled to a temporary folder: ``path``, ``sha256``, ``size`` and
    ``name`` (its base name as sent). ``store()`` puts it into the storage."""

    def __init__(self, path, sha256, size):
        self.path, self.sha256, self.size = path, sha256, size
        self.name = os.path.basename(path)
        self._stored = None

    def store(self):
        """The ``PredictionFile`` of these bytes: the existing row, or a new one with
        its file stored. Call it inside the caller's transaction."""
        existing = PredictionFile.objects.filter(sha256=self.sha256).first()
        if existing is not None:
            return existing
        prediction_file = PredictionFile(
            sha256=self.sha256, size=self.size, original_name=self.name
        )
        with open(self.path, "rb") as f:
            prediction_file.file.save(self.name, File(f), save=False)
        try:
            with transaction.atomic():
                prediction_file.save()
        except IntegrityError:  # the same bytes arrived concurrently
            prediction_file.file.storage.delete(prediction_file.file.name)
            return PredictionFile.objects.get(sha256=self.sha256)
        self._stored = prediction_file.file
        return prediction_file

    def discard(self):
        """Delete the file ``store()`` wrote (its row went with the rolled-back
        transaction)."""
        if self._stored is not None:
            self._stored.storage.delete(self._stored.name)
            self._stored = None


@contextlib.contextmanager
def received_predictions(uploaded, split, *, boxes="keep"):
    """Receive a predictions upload for ``split``: spool it (hashed, block by block),
    refuse an empty file or one over ``BENCHBOOK_MAX_UPLOAD_BYTES`` (``UploadError``),
    and, when it is at most ``BENCHBOOK_INLINE_VALIDATION_BYTES``, load it with the
    engine against the split as the worker will (``engine.InputError`` naming file,
    record and field) under the box policy ``boxes``. Larger files are checked by the
    worker.

    Yields a ``Received``; if the block raises, a file it stored is deleted again, so a
    refused upload leaves nothing behind.
    """
    with tempfile.TemporaryDirectory() as work:
        try:
            path, sha, size = spool(uploaded, _limit(), work)
        except TooLarge as e:
            raise UploadError(str(e)) from None
        received = Received(path, sha, size)
        if size == 0:
            raise UploadError(f"{received.name}: the file is empty")
        if size <= settings.BENCHBOOK_INLINE_VALIDATION_BYTES:
            try:
                _load_predictions(path, load_truth_of(split, boxes), received.name, boxes)
            except engine.InputError as e:
                e.argument = "predictions"  # the request field, for API error bodies
                raise
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


def _load_predictions(path, truth, name, boxes="keep"):
    """The engine's predictions of the file at ``path``, uploaded as ``name`` (the
    format follows the name) under the box policy ``boxes``; errors name the file as
    uploaded."""
    try:
        return engine.load_predictions(
            path, truth, fmt=_format_of(name), boxes=boxes, cache_dir=_cache_dir()
        )
    except engine.InputError as e:
        e.path = os.path.basename(e.path)
        raise


def request_evaluations(split, prediction_file, protocols, *, box_policy="keep"):
    """One evaluation per protocol (existing ones are reused), dispatched on commit.

    ``box_policy`` (``engine.BOX_POLICIES``) is part of what is evaluated: the same
    file under another policy is another evaluation.
    """
    if box_policy not in engine.BOX_POLICIES:
        raise engine.InputError(
            "box_policy", f"unknown box policy {box_policy!r}; use {', '.join(engine.BOX_POLICIES)}"
        )
    evaluations = []
    for protocol in protocols:
        engine.get_protocol(protocol)
        evaluation, created = Evaluation.objects.get_or_create(
            split=split, predictions=prediction_file, protocol=protocol, box_policy=box_policy
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
    """Send again what the queue lost: evaluations queued for too long, and running
    ones whose worker stopped reporting (it crashed or was killed)."""
    now = timezone.now()
    queued_before = now - datetime.timedelta(seconds=settings.BENCHBOOK_QUEUED_GRACE_SECONDS)
    running_before = now - datetime.timedelta(seconds=settings.BENCHBOOK_RUNNING_TIMEOUT_SECONDS)
    stalled = list(
        Evaluation.objects.filter(
            state=Evaluation.State.QUEUED, queued_at__lt=queued_before
        ).values_list("pk", flat=True)
    )
    stalled += list(
        Evaluation.objects.filter(
            state=Evaluation.State.RUNNING, started_at__lt=running_before
        ).values_list("pk", flat=True)
    )
    with transaction.atomic():
        Evaluation.objects.filter(pk__in=stalled).update(
            state=Evaluation.State.QUEUED, queued_at=now
        )
        for pk in stalled:
            dispatch(pk)
    return stalled


# Scoring --------------------------------------------------------------------------


def _claim(evaluation_id, claim):
    """Mark the evaluation running for this delivery, or say why not (None)."""
    with transaction.atomic():
        evaluation = Evaluation.objects.select_for_update().get(pk=evaluation_id)
        if evaluation.finished:
            return None
        fresh = (
            evaluation.started_at
            and timezone.now() - evaluation.started_at
            < datetime.timedelta(seconds=settings.BENCHBOOK_RUNNING_TIMEOUT_SECONDS)
        )
        if (
            evaluation.state == Evaluation.State.RUNNING
            and fresh
            and claim != evaluation.claimed_by
        ):
            return None  # another delivery is scoring it right now
        if evaluation.attempts >= settings.BENCHBOOK_MAX_ATTEMPTS:
            _fail(evaluation, f"gave up after {evaluation.attempts} attempts that did not finish")
            return None
        evaluation.state = Evaluation.State.RUNNING
        evaluation.attempts += 1
        evaluation.started_at = timezone.now()
        evaluation.progress = 5
        evaluation.claimed_by = claim or ""
        evaluation.save(update_fields=["state", "attempts", "started_at", "progress", "claimed_by"])
        return evaluation


def _progress(evaluation, percent):
    Evaluation.objects.filter(pk=evaluation.pk).update(progress=percent)


def _fail(evaluation, message, detail=None):
    evaluation.state = Evaluation.State.FAILED
    evaluation.error = message
    evaluation.error_detail = detail
    evaluation.finished_at = timezone.now()
    evaluation.save(update_fields=["state", "error", "error_detail", "finished_at"])
    transaction.on_commit(lambda: signals.evaluation_failed.send(Evaluation, evaluation=evaluation))


def run_evaluation(evaluation_id, claim=None):
    """Score one evaluation; a finished one is left alone (idempotent).

    ``claim`` identifies the delivery (the task id): a redelivery of the same
    message after a crash restarts the evaluation; a duplicate message while it is
    being scored is dropped. Bad input ends the evaluation as failed with the
    engine's message and no result rows.
    """
    evaluation = _claim(evaluation_id, claim)
    if evaluation is None:
        return Evaluation.objects.get(pk=evaluation_id)
    split, prediction_file = evaluation.split, evaluation.predictions
    protocol = engine.get_protocol(evaluation.protocol)
    try:
        truth = load_truth_of(split, evaluation.box_policy)
        _progress(evaluation, 25)
        with local_path(prediction_file.file) as path:
            predictions = _load_predictions(
                path, truth, prediction_file.original_name, evaluation.box_policy
            )
        _progress(evaluation, 50)
        records = engine.match(truth, predictions, protocol)
        _progress(evaluation, 75)
        tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
        result = engine.score_records(records, protocol, tag_masks=tag_masks)
    except engine.InputError as e:
        e.path = os.path.basename(e.path)  # stored under its original name
        with transaction.atomic():
            _fail(evaluation, str(e), e.as_dict())
        return evaluation
    engine.annotate(result, truth, predictions, records, protocol)
    _store(evaluation, result, records, len(predictions))
    return evaluation


def _store(evaluation, result, records, record_count):
    with tempfile.TemporaryDirectory() as work:
        records_path = os.path.join(work, f"evaluation-{evaluation.pk}.npz")
        records.save(records_path)
        with transaction.atomic():
            scorecard = Scorecard(
                evaluation=evaluation,
                protocol=result["protocol"],
                protocol_version=result["protocol_version"],
                engine_version=result["engine_version"],
                split_sha256=evaluation.split.sha256,
                predictions_sha256=evaluation.predictions.sha256,
                summary=result["summary"],
                result=result,
            )
            with open(records_path, "rb") as f:
                scorecard.records.save(os.path.basename(records_path), File(f), save=False)
            scorecard.save()
            ClassScore.objects.bulk_create(_class_rows(scorecard, result))
            SliceScore.objects.bulk_create(_slice_rows(scorecard, result))
            PredictionFile.objects.filter(pk=evaluation.predictions_id).update(
                record_count=record_count
            )
            evaluation.state = Evaluation.State.DONE
            evaluation.progress = 100
            evaluation.engine_version = result["engine_version"]
            evaluation.finished_at = timezone.now()
            evaluation.save(update_fields=["state", "progress", "engine_version", "finished_at"])
            transaction.on_commit(
                lambda: signals.evaluation_finished.send(Evaluation, evaluation=evaluation)
            )


def _mean_of(rows, key):
    present = [row[key] for row in rows if row.get(key) is not None]
    return sum(present) / len(present) if present else None


def _class_rows(scorecard, result):
    """One row per class, plus the mean row (class_name ''): the protocol's own means
    where it has them, else the mean over present classes."""
    summary, rows = result["summary"], list(result["per_class"].values())

    def first(*keys):
        return next((summary[k] for k in keys if summary.get(k) is not None), None)

    yield ClassScore(
        scorecard=scorecard,
        class_name="",
        ap=summary.get("AP"),
        ap50=first("AP50") if "AP50" in summary else _mean_of(rows, "AP50"),
        ap75=first("AP75") if "AP75" in summary else _mean_of(rows, "AP75"),
        recall=first("AR100", "recall"),
        gt=sum(row["gt"] for row in rows),
        tp=sum(row["tp"] for row in rows),
        fp=sum(row["fp"] for row in rows),
        miss_rate=_mean_of(rows, "miss_rate"),
    )
    for name, row in result["per_class"].items():
        best = row.get("best_f1") or {}
        yield ClassScore(
            scorecard=scorecard,
            class_name=name,
            ap=row["AP"],
            ap50=row.get("AP50"),
            ap75=row.get("AP75"),
            recall=row["recall"],
            gt=row["gt"],
            tp=row["tp"],
            fp=row["fp"],
            best_f1=best.get("f1"),
            best_f1_threshold=best.get("threshold"),
            miss_rate=row["miss_rate"],
        )


def _slice_rows(scorecard, result):
    for kind, slices in result["slices"].items():
        for name, entry in slices.items():
            yield SliceScore(
                scorecard=scorecard,
                kind=kind,
                name=name,
                class_name="",
                ap=entry["AP"],
                images=entry.get("images"),
            )
            for class_name, ap in entry["per_class"].items():
                yield SliceScore(
                    scorecard=scorecard,
                    kind=kind,
                    name=name,
                    class_name=class_name,
                    ap=ap,
                    images=entry.get("images"),
                )
