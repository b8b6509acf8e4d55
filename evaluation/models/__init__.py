"""Benchmark splits, stored prediction files, evaluations and their scorecards, one
module per resource; import them from here (``from evaluation.models import Scorecard``).

Nothing here knows about teams or model versions; ``releases`` links to these rows.

- ``splits``: benchmark splits (frozen revisions) and where their images are
- ``predictions``: stored predictions files and their per-shard pieces
- ``evaluations``: evaluations and the shards and class groups they are scored in
- ``scorecards``: scorecards with their class and slice rows, error breakdowns and
  per-image leave-one-out AP
- ``protocols``: stored custom protocols
"""

from .evaluations import Evaluation, EvaluationClassGroup, EvaluationShard
from .predictions import PredictionFile, PredictionPiece, PredictionPieces
from .protocols import StoredProtocol
from .scorecards import ClassScore, ErrorBreakdown, ImageLeaveOneOut, Scorecard, SliceScore
from .splits import BenchmarkSplit, FrozenError, SplitImages

__all__ = [
    "BenchmarkSplit",
    "ClassScore",
    "ErrorBreakdown",
    "Evaluation",
    "EvaluationClassGroup",
    "EvaluationShard",
    "FrozenError",
    "ImageLeaveOneOut",
    "PredictionFile",
    "PredictionPiece",
    "PredictionPieces",
    "Scorecard",
    "SliceScore",
    "SplitImages",
    "StoredProtocol",
]
