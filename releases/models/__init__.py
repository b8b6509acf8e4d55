"""The models of ``releases``, one module per resource; import them from here
(``from releases.models import ModelVersion``).

- ``teams``: teams, memberships (roles), API tokens
- ``detectors``: detectors, their release criteria and benchmark suites
- ``versions``: model versions and their prediction sets
- ``judgements``: judgements, rule outcomes, notifications of them, sign-offs
- ``intervals``: ΔAP intervals computed on request for a compared pair
- ``audit``: the audit trail and its verifications
- ``history``: the change rows that key a detector's cached history numbers
"""

from .audit import AuditEvent, AuditVerification
from .detectors import BenchmarkSuite, Detector, ReleaseCriteria
from .history import HistoryChange
from .intervals import ComparisonInterval
from .judgements import Judgement, Notification, Outcome, SignOff
from .teams import ApiToken, Membership, Team
from .versions import ModelVersion, PredictionSet, PredictionSetQuerySet

__all__ = [
    "ApiToken",
    "AuditEvent",
    "AuditVerification",
    "BenchmarkSuite",
    "ComparisonInterval",
    "Detector",
    "HistoryChange",
    "Judgement",
    "Membership",
    "ModelVersion",
    "Notification",
    "Outcome",
    "PredictionSet",
    "PredictionSetQuerySet",
    "ReleaseCriteria",
    "SignOff",
    "Team",
]
