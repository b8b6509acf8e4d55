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
    error page, not a truncated download."""
    from .engine import export

    card = scorecard_of(evaluation)
    if card is None:
        return None
    records = records_of(card)
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
