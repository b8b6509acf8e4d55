"""What a finished evaluation stored, read back for the cause pages and downloads: its
match records with their per-detection reasons and boxes, and the split's ground truth
under the evaluation's box policy. Nothing here matches again.

Records scored before engine 2.2 carry no reasons: they get them once per process from
the split and the stored predictions (``engine.reasons.attach``, which reads the
protocol's stored matches; no re-matching).
"""

import collections
import functools
import threading

from .models import Scorecard
from .services.predictions import _load_predictions
from .services.stored import load_records, load_truth_of
from .storage import verified_path


class _Kept:
    """A least-recently-used store of loaded files, keyed by content hash, bounded by
    a number of entries and by their total size (``weigh(value)`` bytes): a value
    larger than the whole budget is returned, not kept."""

    def __init__(self, size, max_bytes=None, weigh=None):
        self.size, self.items = size, collections.OrderedDict()
        self.max_bytes, self.weigh = max_bytes, weigh
        self.bytes = 0
        self.lock = threading.Lock()  # threaded servers: the dict, not the load

    def get(self, key, load):
        with self.lock:
            if key in self.items:
                self.items.move_to_end(key)
                return self.items[key][0]
        value = load()
        weight = self.weigh(value) if self.weigh else 0
        if self.max_bytes is not None and weight > self.max_bytes:
            return value
        with self.lock:
            if key not in self.items:
                self.items[key] = (value, weight)
                self.bytes += weight
            while len(self.items) > self.size or (
                self.max_bytes is not None and self.bytes > self.max_bytes
            ):
                _, (_, dropped) = self.items.popitem(last=False)
                self.bytes -= dropped
        return value

    def clear(self):
        with self.lock:
            self.items.clear()
            self.bytes = 0


def _nbytes(records):
    """The bytes of a records object's arrays."""
    return sum(getattr(v, "nbytes", 0) for v in vars(records).values())


# The compare page reads two versions' records on every split and protocol (20 files
# at 5 splits x 2 protocols): 8 entries made every request load all of them again.
_RECORDS = _Kept(64, max_bytes=512 * 2**20, weigh=_nbytes)


class PositionsUnknown(ValueError):
    """Records scored before engine 2.24.0 from a file whose loader left records out,
    and the stored file no longer loads into those records' detections: their file
    positions cannot be told (``with_file_positions``)."""


def _load_with_reasons(card):
    records = load_records(card)
    if not records.has_reasons:
        from .engine import reasons

        evaluation = card.evaluation
        truth = truth_of(evaluation)
        predictions = _predictions(evaluation, truth)
        order = records.det_order
        corners = None if predictions.corners is None else predictions.corners[order]
        reasons.attach(records, truth, predictions.boxes[order], card.protocol, corners)
    return records


#: ``box_counts`` keys of detections the loaders leave out or lay out anew
#: (``uncompared.COUNT``, ``detection_blocks.UNREADABLE_ON_LOST``, ``as_given.REPLACED``).
_MOVING_COUNTS = ("uncompared_unfit", "unreadable_on_lost_ids", "replaced_by_id")


def _moved(counts):
    """Whether a stored result's counts say the loaders left a record out or laid
    records out anew (then a detection's index is not its record's position)."""
    boxes = (counts.get("boxes") or {}).get("predictions") or {}
    return bool(
        counts.get("dropped_predictions")
        or counts.get("dropped_unknown_images")
        or any(boxes.get(key) for key in _MOVING_COUNTS)
    )


def with_file_positions(card, records):
    """``records`` with ``det_record`` (each detection's record position in the file)
    where records scored before engine 2.24.0 lack it and their file had records left
    out: read from the stored file by today's loader, and kept only if its loaded
    detections are the records' own (count, and each detection's box and score at
    its ``det_order``); else ``records.positions_unknown`` is set (the downloads
    refuse rather than number rows by kept detections). Done once per loaded records
    (``records_of`` keeps them), on the first download, not for the pages."""
    from .engine import InputError
    from .engine.export import RECORD_POSITIONS_SINCE

    if hasattr(records, "positions_unknown"):
        return records
    evaluation = card.evaluation
    if records.det_record is not None or not _older(
        evaluation.engine_version, RECORD_POSITIONS_SINCE
    ):
        records.positions_unknown = False
        return records
    found = Scorecard.objects.filter(pk=card.pk).values_list("result__counts", flat=True)
    counts = found.first() or {}
    if _moved(counts):
        truth = truth_of(evaluation)
        try:
            predictions = _predictions(evaluation, truth)
        except InputError:  # a file today's loader refuses: positions unknown
            predictions = None
        if predictions is None or not _same_detections(predictions, records, counts):
            records.positions_unknown = True
            return records
        records.det_record = predictions.records()[records.det_order]
    records.positions_unknown = False
    return records


def _older(version, than):
    """Whether engine ``version`` (empty: unknown, read as older) precedes ``than``."""
    try:
        return tuple(int(p) for p in version.split(".")) < tuple(int(p) for p in than.split("."))
    except (AttributeError, ValueError):
        return True


def _same_detections(predictions, records, counts):
    import numpy as np

    order = records.det_order
    if len(predictions) != counts.get("predictions"):
        return False
    if len(order) and order.max() >= len(predictions):
        return False
    same_box = np.array_equal(predictions.boxes[order], records.det_box, equal_nan=True)
    same_score = np.array_equal(predictions.score[order], records.det_score, equal_nan=True)
    return same_box and same_score


@functools.lru_cache(maxsize=4)
def _truth(split_id, split_sha256, box_policy):
    from .models import BenchmarkSplit

    return load_truth_of(BenchmarkSplit.objects.get(pk=split_id), box_policy)


def _predictions(evaluation, truth):
    prediction_file = evaluation.predictions
    with verified_path(
        prediction_file.file,
        prediction_file.sha256,
        f"predictions:{prediction_file.pk}",
        "predictions file",
    ) as path:
        return _load_predictions(
            path,
            truth,
            prediction_file.original_name,
            evaluation.box_policy,
            unknown_images=evaluation.unknown_images,
            unknown_classes=evaluation.unknown_classes,
        )


def records_of(scorecard):
    """The scorecard's match records with reasons (hash-checked on first read, then
    kept in the process: a records file never changes once stored)."""
    key = (scorecard.pk, scorecard.records_sha256)
    return _RECORDS.get(key, lambda: _load_with_reasons(scorecard))


def truth_of(evaluation):
    """The evaluation's split as the engine scored it (its box policy)."""
    split = evaluation.split
    return _truth(split.pk, split.sha256, evaluation.box_policy)


def truth_of_split(split):
    """The split as frozen (box policy ``keep``): image ids and sizes do not depend on
    the policy."""
    return _truth(split.pk, split.sha256, "keep")


def scorecard_of(evaluation):
    return Scorecard.objects.filter(evaluation=evaluation).defer("result").first()


def export_chunks(evaluation, fmt):
    """The evaluation's outcome records as CSV or JSON Lines text, an iterator of
    blocks (``engine.export``: one row per detection, then per box, with reason,
    related box or detection and IoU); None when it has no stored records. The
    records are read before the first block is sent, so a broken records file is an
    error page, not a truncated download. ``PositionsUnknown`` when the records'
    file positions cannot be told (``with_file_positions``)."""
    from .engine import export

    card = scorecard_of(evaluation)
    if card is None:
        return None
    records = with_file_positions(card, records_of(card))
    if records.positions_unknown:
        raise PositionsUnknown(
            f"evaluation {evaluation.pk} was scored by engine {evaluation.engine_version or '?'}, "
            "whose records number detections among those kept after the loaders left "
            "records out, and its stored predictions file no longer loads into those "
            "detections: their positions in the file cannot be told. Score the evaluation "
            "again for a download whose detection column is the file position."
        )
    truth = truth_of(evaluation)
    written_by = evaluation.engine_version or export.ENGINE_VERSION  # not today's engine
    digest = _protocol_digest(card)
    return export.FORMATS[fmt](records, truth, engine_version=written_by, protocol_sha256=digest)


def _protocol_digest(card):
    """The protocol digest the stored result recorded (``Protocol.digest``), or "" for a
    result scored before engine 2.19.0 recorded one: the rows then say nothing rather
    than today's digest of a definition that may have changed since."""
    found = Scorecard.objects.filter(pk=card.pk).values_list("result__protocol_sha256", flat=True)
    return found.first() or ""
