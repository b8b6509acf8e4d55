"""What a finished evaluation stored, read back for the cause pages: its match records,
the split's ground truth (under the evaluation's box policy) and its detections' boxes
in the records' order. Nothing here matches again; every number comes from the records.
"""

import functools

import numpy as np

from .models import Scorecard
from .services import _load_predictions, load_records, load_truth_of
from .storage import verified_path


@functools.lru_cache(maxsize=8)
def _records(scorecard_id, records_sha256):
    return load_records(Scorecard.objects.select_related("evaluation").get(pk=scorecard_id))


@functools.lru_cache(maxsize=4)
def _truth(split_id, split_sha256, box_policy):
    from .models import BenchmarkSplit

    return load_truth_of(BenchmarkSplit.objects.get(pk=split_id), box_policy)


@functools.lru_cache(maxsize=8)
def _boxes(evaluation_id, predictions_sha256, split_sha256, box_policy):
    from .models import Evaluation

    evaluation = Evaluation.objects.select_related("split", "predictions").get(pk=evaluation_id)
    truth = truth_of(evaluation)
    prediction_file = evaluation.predictions
    with verified_path(
        prediction_file.file,
        prediction_file.sha256,
        f"predictions:{prediction_file.pk}",
        "predictions file",
    ) as path:
        predictions = _load_predictions(
            path, truth, prediction_file.original_name, evaluation.box_policy
        )
    return predictions.boxes


def records_of(scorecard):
    """The scorecard's match records (hash-checked on first read, then kept in the
    process: a records file never changes once stored)."""
    return _records(scorecard.pk, scorecard.records_sha256)


def truth_of(evaluation):
    """The evaluation's split as the engine scored it (its box policy)."""
    split = evaluation.split
    return _truth(split.pk, split.sha256, evaluation.box_policy)


def detection_boxes(evaluation, records):
    """``(n, 4)`` xywh boxes of the records' detections, in the records' order
    (``det_order`` is each detection's position in the predictions file)."""
    boxes = _boxes(
        evaluation.pk,
        evaluation.predictions.sha256,
        evaluation.split.sha256,
        evaluation.box_policy,
    )
    return boxes[np.asarray(records.det_order, np.int64)]


def truth_of_split(split):
    """The split as frozen (box policy ``keep``): image ids and sizes do not depend on
    the policy."""
    return _truth(split.pk, split.sha256, "keep")
