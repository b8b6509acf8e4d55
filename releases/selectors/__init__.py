"""Reads that pages, the API and services need, one module per page.

Every function here does a fixed number of queries, whatever the number of versions.
"""

from .access import (  # noqa: F401
    CAUTION,
    UPLOAD_ROLES,
    can_attach_split_images,
    can_load_splits,
    detector_for,
    evaluation_for,
    evaluations_of,
    lead_teams,
    reads_all_teams,
    role_in,
    version_for,
    visible_audit_events,
    visible_detectors,
    visible_evaluations,
    visible_set_links,
    visible_teams,
)
from .audit import (  # noqa: F401
    audit_trail,
    detector_choices,
    last_verification,
    spec_history,
    subject_links,
)
from .compare import (  # noqa: F401
    _delta,
    _stored_intervals,
    compare_versions,
    significance,
)
from .decisions import (  # noqa: F401
    baseline_of,
    baselines_of,
    blocked_versions,
    outcomes_of,
    state_of,
    verdict_summary,
    version_badges,
    version_states,
)
from .evidence import (  # noqa: F401
    evidence_for,
)
from .history import (  # noqa: F401
    REVISION_VIEWS,
    HistoryError,
    history_chart,
)
from .overview import (  # noqa: F401
    overview_for,
    split_usage,
)
from .provenance import (  # noqa: F401
    stored_provenance,
)
from .rescore import (  # noqa: F401
    can_rescore,
    rescore_choices,
    rescored_sets,
)
from .scores import (  # noqa: F401
    METRICS,
    _class_rows,
    _scorecards,
    _splits,
    absent_classes,
    absent_note,
    absent_reason,
    absent_reasons,
    class_numbers,
    summary_items,
)
from .version import (  # noqa: F401
    deployed_numbers,
    replaced_sets,
    shown_suite,
    verdict_page,
    version_results,
    version_scorecards,
)
