"""Benchbook's detection metric engine: pure Python + numpy, no Django.

Layers, each usable alone::

    loaders   files -> GroundTruth / Predictions (validated columns)
    matching  -> MatchRecords (per detection: TP / ignored per size bucket and IoU)
    curves    MatchRecords (+ image weights) -> cumulative TP/FP -> AP of any protocol
    scoring   -> a JSON-serialisable scorecard
    reasons, export, tide, confusion, per_image
              why each detection / box is what it is, from the records: CSV / JSON
              Lines rows, TIDE's ΔAP per error type, the confusion matrix, per image

Command line: ``python -m evaluation.engine score --truth GT --predictions PRED``.
"""

from .data import GroundTruth, Predictions
from .difficulty import DIFFICULTY_PRESETS, evaluate_levels, level_counts
from .errors import InputError
from .evaluate import counts, evaluate
from .explain import differences
from .level_provenance import PROVENANCE_KEYS, annotate_levels
from .loaders import (
    BOX_POLICIES,
    VIS_RATIO_READINGS,
    detect_format,
    is_collection,
    load_predictions,
    load_truth,
)
from .loaders.annotation_index import COUNTS as ANNOTATION_COUNTS
from .loaders.cache import Cache
from .loaders.voc_results import is_result_file as is_voc_result_name
from .matching import match
from .pedestrian import MISS_RATE_PRESETS, evaluate_setups, setup_counts
from .protocols import PRESETS, Protocol, get_protocol, protocol_from_dict
from .provenance import annotate, protocol_record
from .records import MatchRecords
from .scorecard import COCO_SUMMARY_KEYS, score_records
from .scoring import headline, slice_scores
from .version import ENGINE_VERSION

__all__ = [
    "ANNOTATION_COUNTS",
    "BOX_POLICIES",
    "Cache",
    "COCO_SUMMARY_KEYS",
    "DIFFICULTY_PRESETS",
    "ENGINE_VERSION",
    "PRESETS",
    "PROVENANCE_KEYS",
    "GroundTruth",
    "InputError",
    "MISS_RATE_PRESETS",
    "MatchRecords",
    "Predictions",
    "Protocol",
    "VIS_RATIO_READINGS",
    "annotate",
    "annotate_levels",
    "counts",
    "detect_format",
    "differences",
    "evaluate",
    "evaluate_levels",
    "evaluate_setups",
    "get_protocol",
    "headline",
    "is_collection",
    "is_voc_result_name",
    "level_counts",
    "load_predictions",
    "load_truth",
    "match",
    "protocol_from_dict",
    "protocol_record",
    "score_records",
    "setup_counts",
    "slice_scores",
]
