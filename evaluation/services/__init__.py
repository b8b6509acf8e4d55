"""Business logic of the evaluation app: load splits, store predictions, score.

Views, commands and tasks call these functions and nothing else writes these models.
One module per job; the names callers use are re-exported here (``policy``: input
policies and request errors; ``splits``: freezing a split; ``stored``: stored content
read back checked; ``predictions``: receiving and loading predictions; ``queueing``:
requesting, dispatching and scoring evaluations). Patch ``queueing.dispatch``, not a
name here, to keep evaluations queued.
"""

from .policy import UploadConflict, UploadError, input_policy  # noqa: F401
from .predictions import received_predictions, store_predictions  # noqa: F401
from .queueing import request_evaluations, requeue_stalled, run_evaluation  # noqa: F401
from .splits import load_split  # noqa: F401
from .stored import load_records, load_truth_of, road_counts_of  # noqa: F401
