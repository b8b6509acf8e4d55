"""API endpoints: parse the request, call one selector or service, serialise.

Reads are scoped exactly as the pages are (``selectors.visible_*``: other teams'
objects are 404); writes go through the same services, which check the role. One
module per resource; ``urls.py`` names the views through this package.
"""

from .base import Endpoint
from .cause import (
    EvaluationRecordsCsv,
    EvaluationRecordsJsonl,
    SplitImages,
    VersionImage,
    VersionImages,
)
from .detectors import (
    DetectorCriteria,
    DetectorDetail,
    DetectorHistory,
    DetectorList,
    DetectorSuite,
    Me,
)
from .rescore import DetectorRescore, EvaluationPredictions
from .results import (
    AuditEventDetail,
    AuditEventList,
    EvaluationDetail,
    EvaluationList,
    EvaluationResult,
    FlagList,
    OutcomeList,
)
from .uploads import PredictionSetDetail, PredictionSetList, SplitDetail, SplitList
from .versions import (
    Comparison,
    SignOffList,
    VersionDetail,
    VersionEvidence,
    VersionJudgements,
    VersionList,
    VersionResults,
    VersionSignOff,
    VersionVerdict,
)

__all__ = [
    "AuditEventDetail",
    "AuditEventList",
    "Comparison",
    "DetectorCriteria",
    "DetectorDetail",
    "DetectorHistory",
    "DetectorList",
    "DetectorRescore",
    "DetectorSuite",
    "Endpoint",
    "EvaluationDetail",
    "EvaluationList",
    "EvaluationPredictions",
    "EvaluationRecordsCsv",
    "EvaluationRecordsJsonl",
    "EvaluationResult",
    "FlagList",
    "Me",
    "OutcomeList",
    "PredictionSetDetail",
    "PredictionSetList",
    "SignOffList",
    "SplitDetail",
    "SplitImages",
    "SplitList",
    "VersionDetail",
    "VersionEvidence",
    "VersionImage",
    "VersionImages",
    "VersionJudgements",
    "VersionList",
    "VersionResults",
    "VersionSignOff",
    "VersionVerdict",
]
