"""What the API returns and accepts, one module per resource. Outputs (``…Serializer``)
are read-only views of the models; inputs (``…Input``) are checked here for shape, then
the services decide. Import them from here (``from releases.api import serializers``).

- ``detectors``: detectors, benchmark suites, release criteria
- ``splits``: benchmark splits and their images
- ``versions``: model versions, prediction sets, re-scoring
- ``judgements``: verdicts, judgements, outcomes, evaluations, sign-offs
- ``audit``: audit events
- ``errors``: the body of every refusal
"""

from .audit import AuditEventSerializer
from .detectors import (
    CriteriaInput,
    CriteriaSerializer,
    DetectorInput,
    DetectorSerializer,
    SuiteInput,
    SuiteSerializer,
)
from .errors import ErrorItemSerializer, ErrorSerializer
from .judgements import (
    EvaluationSerializer,
    JudgementSerializer,
    OutcomeSerializer,
    SignOffInput,
    SignOffSerializer,
    VerdictSerializer,
)
from .splits import SplitImagesInput, SplitInput, SplitSerializer
from .versions import (
    PredictionSetInput,
    PredictionSetSerializer,
    RescoreInput,
    VersionInput,
    VersionSerializer,
)

__all__ = [
    "AuditEventSerializer",
    "CriteriaInput",
    "CriteriaSerializer",
    "DetectorInput",
    "DetectorSerializer",
    "ErrorItemSerializer",
    "ErrorSerializer",
    "EvaluationSerializer",
    "JudgementSerializer",
    "OutcomeSerializer",
    "PredictionSetInput",
    "PredictionSetSerializer",
    "RescoreInput",
    "SignOffInput",
    "SignOffSerializer",
    "SplitImagesInput",
    "SplitInput",
    "SplitSerializer",
    "SuiteInput",
    "SuiteSerializer",
    "VerdictSerializer",
    "VersionInput",
    "VersionSerializer",
]
